// Package report measures how wrong tallyward's summaries are and how fast
// its pipeline is, and writes the answer as a directory: report.md (tables,
// each naming the published bound it is compared with and its source) and
// PNG plots drawn with gonum.org/v1/plot.
//
// Accuracy streams seeded data through every summary of package sketch
// (and github.com/axiomhq/hyperloglog at the same precision) and the
// sliding count of package window, beside an exact reference: a set, a
// map of counts, sorted values, the exact window. FromRows does the same on
// a user's own rows (ReadRows reads them from CSV), so a team can see the
// error on its traffic before trusting a sketch. Speed runs the
// six-feature workload of package bench/workload through a pipeline and
// through the naive Pebble baseline and the in-memory ceiling in the same
// run, over populations of 100k, 1M and 10M live entities
// (workload.Population: every entity made in an arrival phase, then
// Zipf(1.1) and uniform draws over them, nothing expiring).
//
// Guarantees: every figure of Accuracy and FromRows is a function of the
// seed and the input (rerun, same page, except the machine note); a table
// with Checked set lists in Outside every row beyond its bound. Speed
// figures carry no bound and are never asserted. Costs: the quick accuracy
// report takes seconds; the full one about a minute of CPU; the speed
// report about 12 minutes of CPU on 2 cores (mostly the two 10M-entity
// passes) and about 3.5 GiB at its peak.
//
// Not for: timed assertions (speed is reported, not checked), or running
// beside other measurements (speed figures swing with the machine's load,
// which the report records).
package report
