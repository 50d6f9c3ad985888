// Package bench holds benchmarks that compare tallyward against baselines
// measured in the same run, on seeded, pre-generated inputs. It has no
// non-test code of its own beyond this page.
//
// Run:
//
//	go test ./bench/ -run '^$' -bench . -benchmem -benchtime 2000000x
//
// Compare runs with benchstat (golang.org/x/perf/cmd/benchstat):
//
//	go test ./bench/ -run '^$' -bench . -benchmem -count 6 > new.txt
//	benchstat old.txt new.txt
package bench
