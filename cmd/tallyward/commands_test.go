package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestCommandsHelpAndExitCodes: every command answers --help with a
// worked example (exit 0); usage errors exit 2, a bad spec file 3, bad
// input 4, changed definitions 5.
func TestCommandsHelpAndExitCodes(t *testing.T) {
	dir, spec, inputs, _ := setup(t)
	for name := range commands {
		r := runCmd(t, nil, name, "--help")
		if r.code != 0 || !strings.Contains(r.stderr, "Example:") || !strings.Contains(r.stderr, "Exit codes") {
			t.Errorf("%s --help: exit %d, output:\n%s", name, r.code, r.stderr)
		}
	}
	if r := runCmd(t, nil); r.code != exitUsage {
		t.Errorf("no command: exit %d", r.code)
	}
	if r := runCmd(t, nil, "replya"); r.code != exitUsage {
		t.Errorf("unknown command: exit %d", r.code)
	}
	if r := runCmd(t, nil, "replay", "-nope"); r.code != exitUsage {
		t.Errorf("unknown flag: exit %d", r.code)
	}
	bad := filepath.Join(dir, "bad.yaml")
	os.WriteFile(bad, []byte(strings.Replace(e2eSpec, "window: 1h", "window: 1 hour", 1)), 0o644)
	r := runCmd(t, nil, "check", "-spec", bad)
	if r.code != exitBadSpec || !strings.Contains(r.stderr, "bad.yaml:19: entities[0].features[0].window") {
		t.Errorf("bad spec: exit %d:\n%s", r.code, r.stderr)
	}
	// Bad input: a garbage line with no tolerance stops the run with 4,
	// naming the file and line.
	junk := filepath.Join(dir, "junk.jsonl")
	os.WriteFile(junk, []byte(`{"ts":1767225600000,"kind":"login","account":"a","device":"d"}`+"\nnot json\n"), 0o644)
	r = runCmd(t, nil, replayArgs(spec, filepath.Join(dir, "junk-state"), filepath.Join(dir, "junk.csv"), []string{junk})...)
	if r.code != exitBadInput || !strings.Contains(r.stderr, "junk.jsonl:2:") {
		t.Errorf("bad input: exit %d:\n%s", r.code, r.stderr)
	}
	// A file out of time order beyond max_disorder stops with 4, naming
	// file and line; -sort-files reads it.
	late := filepath.Join(dir, "late.jsonl")
	os.WriteFile(late, []byte(`{"ts":1767225600000,"kind":"login","account":"a","device":"d"}
{"ts":1767225900000,"kind":"login","account":"a","device":"d"}
{"ts":1767225700000,"kind":"login","account":"a","device":"d"}
`), 0o644)
	r = runCmd(t, nil, replayArgs(spec, filepath.Join(dir, "late-state"), filepath.Join(dir, "late.csv"), []string{late})...)
	if r.code != exitBadInput || !strings.Contains(r.stderr, "late.jsonl:3:") {
		t.Errorf("disorder: exit %d:\n%s", r.code, r.stderr)
	}
	r = runCmd(t, nil, append([]string{"replay", "-sort-files", "-spec", spec, "-state", filepath.Join(dir, "sorted-state"), "-out", filepath.Join(dir, "sorted.csv")}, late)...)
	if r.code != 0 || !strings.Contains(r.stderr, "3 events, 3 rows") {
		t.Errorf("-sort-files: exit %d:\n%s", r.code, r.stderr)
	}
	// A changed definition: check says what a replay would reset (5), and
	// replay refuses (5) until -reset names it.
	state := filepath.Join(dir, "state")
	if r := runCmd(t, nil, replayArgs(spec, state, filepath.Join(dir, "t.csv"), inputs)...); r.code != 0 {
		t.Fatalf("replay: exit %d:\n%s", r.code, r.stderr)
	}
	changed := filepath.Join(dir, "changed.yaml")
	os.WriteFile(changed, []byte(strings.Replace(e2eSpec, "half_life: 2h", "half_life: 3h", 1)), 0o644)
	r = runCmd(t, nil, "check", "-spec", changed, "-state", state)
	if r.code != exitDefinitions || !strings.Contains(r.stderr, "account.pace") {
		t.Errorf("check on a changed spec: exit %d:\n%s", r.code, r.stderr)
	}
	if r := runCmd(t, nil, "check", "-spec", spec, "-state", state); r.code != 0 || !strings.Contains(r.stderr, "match") {
		t.Errorf("check on the same spec: exit %d:\n%s", r.code, r.stderr)
	}
	if r := runCmd(t, nil, replayArgs(changed, state, filepath.Join(dir, "t2.csv"), inputs)...); r.code != exitDefinitions {
		t.Errorf("replay on a changed spec: exit %d:\n%s", r.code, r.stderr)
	}
}

// TestInspectEraseSnapshot: inspect shows a key's features; erase makes
// it reads as erased, durably; a snapshot taken before holds the key still.
func TestInspectEraseSnapshot(t *testing.T) {
	dir, spec, inputs, events := setup(t)
	state := filepath.Join(dir, "state")
	if r := runCmd(t, nil, replayArgs(spec, state, filepath.Join(dir, "t.csv"), inputs)...); r.code != 0 {
		t.Fatalf("replay: exit %d:\n%s", r.code, r.stderr)
	}
	key := events[len(events)-1].Account
	r := runCmd(t, nil, "inspect", "-spec", spec, "-state", state, "account", key)
	if r.code != 0 || !strings.Contains(r.stderr, "devices_24h") || strings.Contains(r.stderr, "NaN") {
		t.Fatalf("inspect: exit %d:\n%s", r.code, r.stderr)
	}
	snap := filepath.Join(dir, "snap")
	if r := runCmd(t, nil, "snapshot", "-spec", spec, "-state", state, snap); r.code != 0 {
		t.Fatalf("snapshot: exit %d:\n%s", r.code, r.stderr)
	}
	if r := runCmd(t, nil, "erase", "-spec", spec, "-state", state, "account", key); r.code != 0 {
		t.Fatalf("erase: exit %d:\n%s", r.code, r.stderr)
	}
	r = runCmd(t, nil, "inspect", "-spec", spec, "-state", state, "account", key)
	if r.code != 0 || !strings.Contains(r.stderr, "is erased") {
		t.Errorf("inspect after erase: exit %d:\n%s", r.code, r.stderr)
	}
	r = runCmd(t, nil, "inspect", "-spec", spec, "-state", snap, "account", key)
	if r.code != 0 || strings.Contains(r.stderr, "NaN") {
		t.Errorf("inspect of the snapshot: exit %d:\n%s", r.code, r.stderr)
	}
	if r := runCmd(t, nil, "erase", "-spec", spec, "-state", filepath.Join(dir, "nowhere"), "account", key); r.code != exitFailure {
		t.Errorf("erase in a missing state directory: exit %d", r.code)
	}
	if r := runCmd(t, nil, "inspect", "-spec", spec, "-state", state, "merchant", key); r.code != exitUsage {
		t.Errorf("inspect of an unknown entity: exit %d:\n%s", r.code, r.stderr)
	}
}
