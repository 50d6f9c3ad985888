// Command report writes the accuracy report (and, with -speed, the speed
// report) of tallyward into a directory: report.md and PNG plots.
//
//	go run ./bench/cmd/report -speed -out ./bench/latest   # accuracy and speed, about 15 min on 2 cores
//	go run ./bench/cmd/report -out /tmp/report             # accuracy only
//	go run ./bench/cmd/report -quick -out /tmp/report      # seconds; what CI runs
//
// It exits 1 if any error figure is outside its published bound.
package main

import (
	"flag"
	"os"

	"github.com/tallyward/tallyward/bench/report"
)

func main() {
	fs := flag.NewFlagSet("report", flag.ExitOnError)
	opts := report.Flags(fs)
	fs.Parse(os.Args[1:])
	os.Exit(report.Main(*opts, os.Stdout, os.Stderr))
}
