// Package source reads events from files for a spec file's pipeline:
// JSON lines, CSV and Parquet, each optionally gzip- or zstd-compressed
// (by extension: .jsonl/.ndjson, .csv, .parquet, plus .gz or .zst), many
// files merged into one time-ordered stream.
//
// Guarantees:
//   - Order. Files are merged by event time (a k-way merge of their next
//     rows; ties go to the file given first), so the merged stream is as
//     ordered as its least ordered file. A row more than MaxDisorder older
//     than the newest row before it in the same file stops the read with a
//     *DisorderError naming the file and row, unless Options.SortFiles asks
//     for each file to be read whole and sorted first.
//   - Positions. Reader.CursorAt gives, for any sequence number between the
//     last commit's resume point and now, the position of every file (row,
//     line, byte offset) and the rejected-row counts as of that event. A
//     reader opened on such a cursor seeks each file there: plain files by
//     a seek, compressed files by decompressing and discarding up to the
//     offset (no row is decoded twice), Parquet files by row index. Used
//     with tallyward.Pipeline.SetCommitHook it makes a killed replay resume
//     where its last commit was.
//   - Bad rows (malformed JSON or CSV, a missing required field, an
//     unparseable value or time) are skipped, counted, and reported to
//     Options.OnBadRow as a *RowError with the file and line (row number
//     for Parquet). More than Options.MaxBadRows stops the read with
//     ErrTooManyBadRows. Nothing from a bad row reaches the pipeline.
//
// Costs: one decoded row per file is held at a time (all rows of a file
// under SortFiles); the merge costs O(files) per event. Each position
// kept for CursorAt costs 40 bytes, from the last commit's resume point
// to now.
//
// Handover joins a finite history to a live source such as FromChannel or
// Lines (JSON lines from standard input or a pipe).
//
// A Reader is not safe for concurrent use.
package source
