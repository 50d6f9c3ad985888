package source

import (
	"bufio"
	"io"

	"github.com/tallyward/tallyward"
	"github.com/tallyward/tallyward/specfile"
)

// Lines is a live source reading JSON lines from r (standard input, a
// pipe, a socket) until it ends. Bad rows are skipped and told to onBad
// (which may be nil) with name and line; a read error other than the end
// of r is yielded and ends the source. It keeps no position: for
// resumable input, use files and a Reader.
func Lines(r io.Reader, name string, s *specfile.Schema, onBad func(*RowError)) tallyward.Source[specfile.Event] {
	return func(yield func(specfile.Event, error) bool) {
		jr := &jsonlReader{name: name, br: bufio.NewReaderSize(r, 1<<16), dec: s.NewJSONDecoder()}
		for {
			ev, _, err := jr.read()
			if err == io.EOF {
				return
			}
			if re, ok := err.(*RowError); ok {
				if onBad != nil {
					onBad(re)
				}
				continue
			}
			if !yield(ev, err) || err != nil {
				return
			}
		}
	}
}
