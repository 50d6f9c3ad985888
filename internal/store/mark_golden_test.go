package store

import (
	"encoding/hex"
	"errors"
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestMarkGolden pins the commit Mark, version 1 (Mark.AppendBinary): the
// blob kept in testdata/ for good decodes to the same Mark and re-encodes
// to itself; damaged copies fail with ErrCorrupt.
func TestMarkGolden(t *testing.T) {
	m := Mark{Seen: 123_456, Resume: 123_000, Watermark: 1_700_000_000_000_000_000, Cursor: []byte("part-3@9981"), Extra: []byte{1, 0, 2}}
	got, err := m.AppendBinary(nil)
	if err != nil {
		t.Fatal(err)
	}
	raw, err := os.ReadFile(filepath.Join("testdata", "mark-v1.hex"))
	if err != nil {
		t.Fatal(err)
	}
	want, err := hex.DecodeString(strings.TrimSpace(string(raw)))
	if err != nil {
		t.Fatal(err)
	}
	if hex.EncodeToString(got) != hex.EncodeToString(want) {
		t.Fatalf("Mark encoding changed:\n got %x\nwant %x", got, want)
	}
	var back Mark
	if err := back.UnmarshalBinary(want); err != nil {
		t.Fatal(err)
	}
	if back.Seen != m.Seen || back.Resume != m.Resume || back.Watermark != m.Watermark ||
		string(back.Cursor) != string(m.Cursor) || string(back.Extra) != string(m.Extra) {
		t.Fatalf("decoded %+v, want %+v", back, m)
	}
	for i := range len(want) {
		if err := new(Mark).UnmarshalBinary(want[:i]); !errors.Is(err, ErrCorrupt) {
			t.Fatalf("truncated at %d: %v", i, err)
		}
	}
	if err := new(Mark).UnmarshalBinary(append([]byte{2}, want[1:]...)); !errors.Is(err, ErrCorrupt) {
		t.Fatalf("version 2: %v", err)
	}
}
