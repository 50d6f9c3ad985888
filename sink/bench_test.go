package sink_test

import (
	"path/filepath"
	"testing"

	"github.com/tallyward/tallyward/sink"
)

// BenchmarkTable: writing 100k rows (3 fields, 2 features) and finishing
// the table, per format; per-row cost is ns/op divided by 100k.
//
//	go test ./sink/ -run '^$' -bench Table -benchtime 5x
func BenchmarkTable(b *testing.B) {
	rows := genRows(100_000)
	for _, c := range []struct {
		name   string
		format sink.Format
	}{{"t.csv", sink.CSV}, {"t.jsonl", sink.JSONLines}, {"t.parquet", sink.Parquet}} {
		b.Run(c.name, func(b *testing.B) {
			dir := b.TempDir()
			for b.Loop() {
				tb, err := sink.Open(filepath.Join(dir, c.name), c.format, cols, -1)
				if err != nil {
					b.Fatal(err)
				}
				for _, r := range rows {
					tb.Write(r)
				}
				if err := tb.Close(); err != nil {
					b.Fatal(err)
				}
			}
			b.ReportMetric(float64(b.Elapsed().Nanoseconds())/float64(b.N*len(rows)), "ns/row")
		})
	}
}
