package join

import (
	"bytes"
	"math"
	"os"
	"path/filepath"
	"testing"

	"github.com/stretchr/testify/require"
)

func TestJSONLinesFormatAndTrim(t *testing.T) {
	var buf bytes.Buffer
	j := NewJSONLines(&buf)
	require.NoError(t, j.Begin([]string{"account.n", "account.max"}, []string{"chargeback"}))
	for i := range 5 {
		require.NoError(t, j.Write(&TrainingRow{Seq: uint64(i), ID: `p"` + string(rune('a'+i)), Time: int64(i), Features: []float64{float64(i), math.NaN()}, Labels: []float64{0.5}}))
	}
	require.NoError(t, j.Flush())
	first, _, _ := bytes.Cut(buf.Bytes(), []byte("\n"))
	require.Equal(t, `{"seq":0,"id":"p\"a","time":0,"features":{"account.n":0,"account.max":null},"labels":{"chargeback":0.5}}`, string(first))

	path := filepath.Join(t.TempDir(), "rows.jsonl")
	torn := append(bytes.Clone(buf.Bytes()), `{"seq":5,"id":"p`...)
	require.NoError(t, os.WriteFile(path, torn, 0o644))
	require.NoError(t, TrimJSONLines(path, 9))
	got, err := os.ReadFile(path)
	require.NoError(t, err)
	require.Equal(t, buf.Bytes(), got, "a torn last line is cut")
	require.NoError(t, TrimJSONLines(path, 3))
	got, err = os.ReadFile(path)
	require.NoError(t, err)
	require.Equal(t, 3, bytes.Count(got, []byte("\n")))
	require.True(t, bytes.HasPrefix(buf.Bytes(), got))
	require.NoError(t, TrimJSONLines(filepath.Join(t.TempDir(), "missing"), 0))
}

// TrimJSONLines on any file content: no panic, and the file is only ever
// cut, never rewritten.
func FuzzTrimJSONLines(f *testing.F) {
	f.Add([]byte("{\"seq\":0,\"id\":\"a\"}\n{\"seq\":1,\"id\":\"b\"}\n"), uint64(1))
	f.Add([]byte("{\"seq\":0,\"id\":\"a\"}\n{\"seq\":"), uint64(5))
	f.Add([]byte("not a row\n"), uint64(0))
	f.Fuzz(func(t *testing.T, content []byte, next uint64) {
		path := filepath.Join(t.TempDir(), "rows.jsonl")
		require.NoError(t, os.WriteFile(path, content, 0o644))
		err := TrimJSONLines(path, next)
		got, rerr := os.ReadFile(path)
		require.NoError(t, rerr)
		if err != nil {
			require.Equal(t, content, got, "a refused file is left as it was")
			return
		}
		require.True(t, bytes.HasPrefix(content, got))
	})
}
