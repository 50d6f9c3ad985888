package main

import (
	"bytes"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// tallyward accuracy on a user's file: the report is written, exit codes
// follow the command's conventions (4 bad rows, 2 usage).
func TestAccuracyOnUserFile(t *testing.T) {
	dir := t.TempDir()
	var b strings.Builder
	b.WriteString("key,item,value\n")
	for i := range 3000 {
		b.WriteString("shop-" + string(rune('a'+i%7)) + ",card-" + strconv.Itoa(i%911) + "," + strconv.Itoa(i%97+1) + "\n")
	}
	good := filepath.Join(dir, "rows.csv")
	if err := os.WriteFile(good, []byte(b.String()), 0o644); err != nil {
		t.Fatal(err)
	}
	out := filepath.Join(dir, "out")
	var stdout, stderr bytes.Buffer
	if code := run([]string{"accuracy", "-input", good, "-out", out}, &stdout, &stderr); code != exitOK {
		t.Fatalf("exit %d: %s%s", code, stdout.String(), stderr.String())
	}
	md, err := os.ReadFile(filepath.Join(out, "report.md"))
	if err != nil || !bytes.Contains(md, []byte("Distinct items per key")) {
		t.Fatalf("report.md: %v\n%s", err, md)
	}

	bad := filepath.Join(dir, "bad.csv")
	if err := os.WriteFile(bad, []byte("a,b,notanumber\n"), 0o644); err != nil {
		t.Fatal(err)
	}
	if code := run([]string{"accuracy", "-input", bad, "-out", out}, &stdout, &stderr); code != exitBadInput {
		t.Errorf("bad rows: exit %d, want %d", code, exitBadInput)
	}
	if code := run([]string{"accuracy", "extra"}, &stdout, &stderr); code != exitUsage {
		t.Errorf("extra argument: exit %d, want %d", code, exitUsage)
	}
}
