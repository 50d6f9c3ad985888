package source

import (
	"encoding/hex"
	"flag"
	"os"
	"reflect"
	"strings"
	"testing"
)

var rewrite = flag.Bool("rewrite", false, "rewrite golden files")

// TestCursorGolden: the v1 cursor layout, kept in testdata for good, still
// decodes to the same positions and re-encodes to the same bytes.
func TestCursorGolden(t *testing.T) {
	r := &Reader{files: []*input{{path: "events-01.jsonl.gz", size: 123456}, {path: "b.parquet", size: 99}}}
	states := []fileState{
		{at: pos{row: 1000, line: 1002, offset: 87654}, bad: 2, hasMax: true, maxT: 1_767_225_600_123_000_000},
		{at: pos{row: 7}},
	}
	blob := r.encodeCursor(4242, states)
	const golden = "testdata/cursor-v1.hex"
	if *rewrite {
		os.WriteFile(golden, []byte(hex.EncodeToString(blob)+"\n"), 0o644)
	}
	text, err := os.ReadFile(golden)
	if err != nil {
		t.Fatal(err)
	}
	want, err := hex.DecodeString(strings.TrimSpace(string(text)))
	if err != nil {
		t.Fatal(err)
	}
	seq, files, got, err := decodeCursor(want)
	if err != nil {
		t.Fatal(err)
	}
	if seq != 4242 || !reflect.DeepEqual(got, states) || files[0] != (cursorFile{"events-01.jsonl.gz", 123456}) || files[1] != (cursorFile{"b.parquet", 99}) {
		t.Fatalf("decoded %d %+v %+v", seq, files, got)
	}
	if hex.EncodeToString(blob) != hex.EncodeToString(want) {
		t.Fatalf("encoding changed:\n%x\nwant\n%x", blob, want)
	}
	for i := range want {
		if _, _, _, err := decodeCursor(want[:i]); err == nil {
			t.Fatalf("truncated cursor of %d bytes accepted", i)
		}
	}
}
