// Package bench holds benchmarks that compare tallyward against baselines
// measured in the same run, on seeded, pre-generated inputs. The workload
// they share with the speed report lives in bench/workload; the accuracy
// and speed report in bench/report (see bench/README.md).
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
