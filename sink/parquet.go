package sink

import (
	"bufio"
	"encoding/binary"
	"errors"
	"fmt"
	"io"
	"math"
	"os"

	"github.com/parquet-go/parquet-go"
	"github.com/tallyward/tallyward/specfile"
)

// parquetTable stages rows in PATH.rows and writes PATH on Close.
//
// Staged row layout, per row:
//
//	varint   time (Unix ns)
//	per field: string: uvarint length + bytes; number: 8 bytes float64
//	           bits, little-endian; bool: 1 byte
//	per feature: 8 bytes float64 bits, little-endian
//
// The staging file has no header: it lives only for the run, and the
// columns come from the spec file.
type parquetTable struct {
	path, staged string
	cols         Columns
	f            *os.File
	w            *bufio.Writer
	n            int64
	buf          []byte
	err          error
	done         bool // the table was finished by an earlier run
}

func openParquet(path string, cols Columns, committed int64) (Table, error) {
	staged := path + ".rows"
	if committed > 0 {
		if _, err := os.Stat(staged); errors.Is(err, os.ErrNotExist) {
			if _, err := os.Stat(path); err == nil {
				// An earlier run finished the table after its last
				// commit: there is nothing left to write.
				return &parquetTable{path: path, cols: cols, n: committed, done: true}, nil
			}
		}
	}
	f, err := openAppend(staged, committed)
	if err != nil {
		return nil, err
	}
	return &parquetTable{path: path, staged: staged, cols: cols, f: f, w: bufio.NewWriterSize(f, 1<<18), n: max(committed, 0)}, nil
}

var errFinished = errors.New("sink: the table was already finished by an earlier run")

func (t *parquetTable) Write(r Row) error {
	if t.done {
		return errFinished
	}
	if t.err != nil {
		return t.err
	}
	b := binary.AppendVarint(t.buf[:0], r.Time)
	for i, f := range t.cols.Fields {
		switch f.Type {
		case specfile.String:
			b = binary.AppendUvarint(b, uint64(len(r.Fields[i].Str)))
			b = append(b, r.Fields[i].Str...)
		case specfile.Number:
			b = binary.LittleEndian.AppendUint64(b, math.Float64bits(r.Fields[i].Num))
		case specfile.Bool:
			b = append(b, byte(r.Fields[i].Num))
		}
	}
	for _, v := range r.Values {
		b = binary.LittleEndian.AppendUint64(b, math.Float64bits(v))
	}
	t.buf = b
	n, err := t.w.Write(b)
	t.n += int64(n)
	t.err = err
	return err
}

func (t *parquetTable) Commit() (int64, error) {
	if t.done {
		return t.n, nil
	}
	if t.err != nil {
		return 0, t.err
	}
	if err := t.w.Flush(); err != nil {
		t.err = err
		return 0, err
	}
	if err := t.f.Sync(); err != nil {
		t.err = err
		return 0, err
	}
	return t.n, nil
}

// Close writes the Parquet file from the staged rows.
func (t *parquetTable) Close() error {
	if t.done {
		return nil
	}
	if _, err := t.Commit(); err != nil {
		t.f.Close()
		return err
	}
	if _, err := t.f.Seek(0, io.SeekStart); err != nil {
		t.f.Close()
		return err
	}
	err := t.convert(bufio.NewReaderSize(t.f, 1<<18))
	err = errors.Join(err, t.f.Close())
	if err == nil {
		err = os.Remove(t.staged)
	}
	return err
}

// Schema returns the Parquet schema of a table with these columns.
// Columns are stored in name order (Parquet groups are unordered maps).
func Schema(cols Columns) *parquet.Schema {
	g := parquet.Group{cols.Time: parquet.Timestamp(parquet.Nanosecond)}
	for _, f := range cols.Fields {
		switch f.Type {
		case specfile.String:
			g[f.Name] = parquet.String()
		case specfile.Number:
			g[f.Name] = parquet.Leaf(parquet.DoubleType)
		case specfile.Bool:
			g[f.Name] = parquet.Leaf(parquet.BooleanType)
		}
	}
	for _, n := range cols.Features {
		g[n] = parquet.Leaf(parquet.DoubleType)
	}
	return parquet.NewSchema("features", g)
}

func (t *parquetTable) convert(r *bufio.Reader) error {
	schema := Schema(t.cols)
	index := func(name string) int {
		leaf, _ := schema.Lookup(name)
		return leaf.ColumnIndex
	}
	timeCol := index(t.cols.Time)
	fieldCols := make([]int, len(t.cols.Fields))
	for i, f := range t.cols.Fields {
		fieldCols[i] = index(f.Name)
	}
	featCols := make([]int, len(t.cols.Features))
	for i, n := range t.cols.Features {
		featCols[i] = index(n)
	}
	tmp := t.path + ".tmp"
	out, err := os.Create(tmp)
	if err != nil {
		return err
	}
	w := parquet.NewWriter(out, schema, parquet.Compression(&parquet.Zstd), parquet.CreatedBy("tallyward", "", ""))
	ncols := 1 + len(fieldCols) + len(featCols)
	// Rows and string bytes are reused batch after batch: WriteRows
	// copies values into the writer's column buffers.
	const batch = 1024
	rows := make([]parquet.Row, 0, batch)
	spare := make([]parquet.Row, batch)
	for i := range spare {
		spare[i] = make(parquet.Row, ncols)
	}
	var arena []byte
	flush := func() error {
		_, err := w.WriteRows(rows)
		rows, arena = rows[:0], arena[:0]
		return err
	}
	for {
		tm, err := binary.ReadVarint(r)
		if err == io.EOF {
			break
		}
		if err != nil {
			return errors.Join(fmt.Errorf("sink: staged rows of %s: %w", t.path, err), out.Close())
		}
		row := spare[len(rows)]
		row[timeCol] = parquet.Int64Value(tm).Level(0, 0, timeCol)
		var u [8]byte
		for i, f := range t.cols.Fields {
			c := fieldCols[i]
			switch f.Type {
			case specfile.String:
				n, err1 := binary.ReadUvarint(r)
				if err1 == nil && n > 1<<30 {
					err1 = errors.New("string too long")
				}
				var str []byte
				if err1 == nil {
					if cap(arena)-len(arena) < int(n) {
						// A new arena: slices of the old one are still
						// referenced by this batch's rows.
						arena = make([]byte, 0, max(1<<20, int(n)))
					}
					str = arena[len(arena) : len(arena)+int(n)]
					arena = arena[:len(arena)+int(n)]
					_, err1 = io.ReadFull(r, str)
				}
				err = err1
				row[c] = parquet.ByteArrayValue(str).Level(0, 0, c)
			case specfile.Number:
				_, err = io.ReadFull(r, u[:])
				row[c] = parquet.DoubleValue(math.Float64frombits(binary.LittleEndian.Uint64(u[:]))).Level(0, 0, c)
			case specfile.Bool:
				var bb byte
				bb, err = r.ReadByte()
				row[c] = parquet.BooleanValue(bb != 0).Level(0, 0, c)
			}
			if err != nil {
				break
			}
		}
		for _, c := range featCols {
			if err != nil {
				break
			}
			_, err = io.ReadFull(r, u[:])
			row[c] = parquet.DoubleValue(math.Float64frombits(binary.LittleEndian.Uint64(u[:]))).Level(0, 0, c)
		}
		if err != nil {
			return errors.Join(fmt.Errorf("sink: staged rows of %s: truncated row: %w", t.path, err), out.Close())
		}
		rows = append(rows, row)
		if len(rows) == cap(rows) {
			if err := flush(); err != nil {
				return errors.Join(err, out.Close())
			}
		}
	}
	if err := flush(); err != nil {
		return errors.Join(err, out.Close())
	}
	if err := w.Close(); err != nil {
		return errors.Join(err, out.Close())
	}
	if err := out.Sync(); err != nil {
		return errors.Join(err, out.Close())
	}
	if err := out.Close(); err != nil {
		return err
	}
	return os.Rename(tmp, t.path)
}
