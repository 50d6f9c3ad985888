package tallyward

import (
	"bufio"
	"bytes"
	"context"
	"crypto/sha256"
	"encoding/hex"
	"errors"
	"flag"
	"fmt"
	"io"
	"math/rand/v2"
	"os"
	"os/exec"
	"path/filepath"
	"slices"
	"sort"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/cockroachdb/pebble/v2"
	pebblerecord "github.com/cockroachdb/pebble/v2/record"
	"github.com/cockroachdb/pebble/v2/vfs"
	"github.com/stretchr/testify/require"
	"github.com/tallyward/tallyward/internal/store"
)

var damageTrials = flag.Int("damage-trials", 0, "byte positions per file type in TestDamageMatrix (default 200, 24 with -short)")

// damageStore builds, in dir on disk, the store the damage tests break:
// one large commit of 20,000 new entities (written as one ingested table),
// then 50 small commits; after every fifth of the first 25 the memtable
// is flushed to a table, so the last 25 commits are only in the
// write-ahead log. Event
// times stay within a few minutes: nothing expires. It returns the digest
// of the stored records after each commit, by the commit's Seen.
func damageStore(t testing.TB, dir string) map[uint64]string {
	opts := Options{Dir: dir, CommitEvery: -1}
	p, err := Open(loginSpec(nil), opts)
	require.NoError(t, err)
	digests := map[uint64]string{}
	commit := func() {
		require.NoError(t, p.Commit(nil))
		digests[p.Stats().NextSeq] = recordDigest(t, p.store.DB())
	}
	tm := t0
	for i := range 20_000 {
		tm += int64(time.Millisecond)
		require.NoError(t, p.Process(login{T: tm, Account: fmt.Sprintf("acct-%05d", i), Addr: fmt.Sprintf("10.1.%d.%d", i/256%8, i%256), OK: i%3 != 0}))
	}
	commit()
	r := rand.New(rand.NewPCG(3, 3))
	for c := range 50 {
		for range 10 {
			tm += int64(time.Millisecond)
			i := r.IntN(20_100) // mostly existing accounts, some new
			require.NoError(t, p.Process(login{T: tm, Account: fmt.Sprintf("acct-%05d", i), Addr: "10.2.0.1", OK: true}))
		}
		commit()
		if c%5 == 4 && c < 25 {
			require.NoError(t, p.store.DB().Flush())
		}
	}
	require.NoError(t, p.Close())
	return digests
}

// recordDigest hashes every stored entity record (key and value).
func recordDigest(t testing.TB, db *pebble.DB) string {
	d, err := recordDigestErr(db)
	require.NoError(t, err)
	return d
}

func recordDigestErr(db *pebble.DB) (string, error) {
	it, err := db.NewIter(&pebble.IterOptions{LowerBound: []byte{0x03}, UpperBound: []byte{0x04}})
	if err != nil {
		return "", err
	}
	h := sha256.New()
	for ok := it.First(); ok; ok = it.Next() {
		fmt.Fprintf(h, "%q=%x\n", it.Key(), it.Value())
	}
	if err := it.Close(); err != nil {
		return "", err
	}
	return hex.EncodeToString(h.Sum(nil)[:8]), nil
}

// manifestRecords returns the offsets at which the MANIFEST's records end.
func manifestRecords(t *testing.T, path string) []int64 {
	f, err := os.Open(path)
	require.NoError(t, err)
	defer f.Close()
	r := pebblerecord.NewReader(f, 0)
	var ends []int64
	for {
		rec, err := r.Next()
		if err == io.EOF {
			return ends
		}
		require.NoError(t, err)
		_, err = io.Copy(io.Discard, rec)
		require.NoError(t, err)
		ends = append(ends, r.Offset())
	}
}

func storeFile(t *testing.T, dir, pattern string) string {
	m, err := filepath.Glob(filepath.Join(dir, pattern))
	require.NoError(t, err)
	require.Len(t, m, 1, pattern)
	return m[0]
}

// A flipped byte in the MANIFEST made Pebble stop reading it at the
// damaged record, delete the tables listed after it as garbage and open
// with the newest commit's progress: 20,000 entities then read as never
// seen. Open must refuse instead, naming the file, and leave the files as
// they were; ReadOnly opens it for salvage with the damage in Notices.
func TestDamagedManifestIsRefused(t *testing.T) {
	tmpl := t.TempDir()
	damageStore(t, tmpl)
	manifest := filepath.Base(storeFile(t, tmpl, "MANIFEST-*"))
	ends := manifestRecords(t, filepath.Join(tmpl, manifest))
	require.GreaterOrEqual(t, len(ends), 2)
	r := rand.New(rand.NewPCG(8, 8))
	for trial := range 20 {
		dir := t.TempDir()
		_, err := vfs.Clone(vfs.Default, vfs.Default, tmpl, dir)
		require.NoError(t, err)
		path := filepath.Join(dir, manifest)
		b, err := os.ReadFile(path)
		require.NoError(t, err)
		// A byte inside any record but the first (the one Pebble itself
		// would refuse to open without).
		pos := ends[0] + r.Int64N(ends[len(ends)-1]-ends[0])
		b[pos] ^= byte(1 + r.IntN(255))
		require.NoError(t, os.WriteFile(path, b, 0o644))
		before := listFiles(t, dir)

		_, err = Open(loginSpec(nil), Options{Dir: dir})
		require.ErrorIs(t, err, ErrStoreDamaged, "trial %d: byte %d", trial, pos)
		require.ErrorContains(t, err, manifest)
		require.Equal(t, before, listFiles(t, dir), "a refused open changes no file")

		p, err := Open(loginSpec(nil), Options{Dir: dir, ReadOnly: true})
		require.NoError(t, err)
		require.Contains(t, strings.Join(p.Notices(), "\n"), manifest)
		require.ErrorIs(t, p.Commit(nil), ErrReadOnly)
		require.NoError(t, p.Close())
		require.Equal(t, before, listFiles(t, dir), "a read-only open changes no file")
	}
}

// A MANIFEST that ends cleanly but early (its last edits lost whole, which
// no checksum can see) loses the tables they listed: after a clean Close
// the size Close recorded catches it.
func TestShortManifestIsRefused(t *testing.T) {
	tmpl := t.TempDir()
	damageStore(t, tmpl)
	manifest := filepath.Base(storeFile(t, tmpl, "MANIFEST-*"))
	ends := manifestRecords(t, filepath.Join(tmpl, manifest))
	for k := 1; k < len(ends); k++ {
		dir := t.TempDir()
		_, err := vfs.Clone(vfs.Default, vfs.Default, tmpl, dir)
		require.NoError(t, err)
		require.NoError(t, os.Truncate(filepath.Join(dir, manifest), ends[k-1]))
		_, err = Open(loginSpec(nil), Options{Dir: dir})
		require.ErrorIs(t, err, ErrStoreDamaged, "first %d of %d records", k, len(ends))
		require.ErrorContains(t, err, "shorter than when the store was closed")
	}
}

// A whole MANIFEST from an earlier point (no checksum can see that it is
// stale) after a crash, so that no size was recorded: the table flushed
// since is deleted as garbage while the log still carries the newest
// Mark. The record count of the last commit's progress catches it.
func TestLostTablesAreRefused(t *testing.T) {
	dir := t.TempDir()
	p, err := Open(loginSpec(nil), Options{Dir: dir, CommitEvery: -1})
	require.NoError(t, err)
	tm := t0
	feed := func(from, n int) {
		for i := from; i < from+n; i++ {
			tm += int64(time.Millisecond)
			require.NoError(t, p.Process(login{T: tm, Account: fmt.Sprintf("acct-%05d", i), Addr: "10.0.0.1", OK: true}))
		}
		require.NoError(t, p.Commit(nil))
	}
	feed(0, 20_000)
	require.NoError(t, p.store.DB().Flush())
	current := func() string {
		desc, err := pebble.Peek(dir, vfs.Default)
		require.NoError(t, err)
		return desc.ManifestFilename
	}
	stale, err := os.ReadFile(current())
	require.NoError(t, err)
	for c := range 20 {
		feed(20_000+c*10, 10)
		if c == 9 {
			require.NoError(t, p.store.DB().Flush())
		}
	}
	require.NoError(t, p.Close())
	require.NoError(t, os.WriteFile(current(), stale, 0o644))
	require.NoError(t, os.Remove(filepath.Join(dir, "CLOSED-CLEANLY")))
	_, err = Open(loginSpec(nil), Options{Dir: dir})
	require.ErrorIs(t, err, ErrStoreDamaged)
	require.ErrorContains(t, err, "entity records")
	t.Logf("refused: %v", err)
}

func mustCount(t *testing.T, p *Pipeline[login]) int64 {
	n, err := p.store.CountRecords()
	require.NoError(t, err)
	return n
}

func listFiles(t *testing.T, dir string) []string {
	var out []string
	ents, err := os.ReadDir(dir)
	require.NoError(t, err)
	for _, e := range ents {
		if e.Name() == "LOCK" {
			continue
		}
		info, err := e.Info()
		require.NoError(t, err)
		b, err := os.ReadFile(filepath.Join(dir, e.Name()))
		require.NoError(t, err)
		out = append(out, fmt.Sprintf("%s %d %x", e.Name(), info.Size(), sha256.Sum256(b)))
	}
	return out
}

// Outcomes of one damaged store in TestDamageMatrix. The first four are
// allowed; the rest fail the test.
const (
	outIntact     = "opened, all records as committed"
	outOpenError  = "error at Open"
	outReadError  = "error at read"
	outRollback   = "rollback to an earlier commit, with warning"
	outSilentBack = "FAIL: rollback without warning"
	outWrong      = "FAIL: wrong records without error"
	outUnclear    = "FAIL: unclear error"
	outDied       = "FAIL: process died"
	outHung       = "FAIL: hang"
)

var damageTypes = []string{"MANIFEST", "table", "WAL", "OPTIONS"}

// The damage matrix: the store of damageStore with one byte flipped, at
// seeded positions in each kind of file (the MANIFEST, a table, the
// write-ahead log, the OPTIONS file). Every outcome must be an error at
// Open, an error at a read (both naming the damage: ErrStoreDamaged,
// ErrCorrupt or Pebble's corruption error), a rollback to an earlier commit
// that Open reports (Stats.RolledBack, Notices), or no visible effect. A
// panic, a hang, a process exit or records that match no commit fail it.
//
// Trials run in child processes, so that a trial that kills its process
// is reported as such; the table of outcomes is logged:
//
//	go test -run TestDamageMatrix -v . [-damage-trials 200]
func TestDamageMatrix(t *testing.T) {
	n := *damageTrials
	if n == 0 {
		n = 200
		if testing.Short() {
			n = 24
		}
	}
	tmpl := t.TempDir()
	digests := damageStore(t, filepath.Join(tmpl, "db"))
	var lines []string
	for seq, d := range digests {
		lines = append(lines, fmt.Sprintf("%d %s", seq, d))
	}
	require.NoError(t, os.WriteFile(filepath.Join(tmpl, "digests"), []byte(strings.Join(lines, "\n")), 0o644))

	table := map[string]map[string]int{}
	distinct := map[string]map[string]bool{} // file and byte position per type
	examples := map[string]string{}
	var failures []string
	for _, typ := range damageTypes {
		table[typ] = map[string]int{}
		distinct[typ] = map[string]bool{}
		for from := 0; from < n; {
			outs, next := runDamageChild(t, tmpl, typ, from, n)
			for _, o := range outs {
				table[typ][o.class]++
				where, _, _ := strings.Cut(o.detail, ":")
				distinct[typ][where] = true
				if _, ok := examples[typ+o.class]; !ok {
					examples[typ+o.class] = o.detail
				}
				if strings.HasPrefix(o.class, "FAIL") {
					failures = append(failures, fmt.Sprintf("%s trial %d: %s: %s", typ, o.trial, o.class, o.detail))
				}
			}
			from = next
		}
	}
	var b strings.Builder
	fmt.Fprintf(&b, "outcomes of one flipped byte, %d positions per file type:\n", n)
	for _, typ := range damageTypes {
		fmt.Fprintf(&b, "  %-9s (%d distinct file and byte positions)\n", typ, len(distinct[typ]))
		var classes []string
		for c := range table[typ] {
			classes = append(classes, c)
		}
		sort.Strings(classes)
		for _, c := range classes {
			fmt.Fprintf(&b, "  %-9s %-45s %4d\n", typ, c, table[typ][c])
			if testing.Verbose() {
				fmt.Fprintf(&b, "            e.g. %.300s\n", examples[typ+c])
			}
		}
	}
	t.Log(b.String())
	for _, f := range failures {
		t.Error(f)
	}
}

type damageOutcome struct {
	trial         int
	class, detail string
}

// runDamageChild runs trials from..n-1 of typ in a child process and
// returns their outcomes and the trial to continue from: after a child
// dies or hangs, the trial it was in is recorded as such and the next
// child starts after it.
func runDamageChild(t *testing.T, tmpl, typ string, from, n int) ([]damageOutcome, int) {
	ctx, cancel := context.WithTimeout(context.Background(), time.Duration(n-from)*5*time.Second+time.Minute)
	defer cancel()
	cmd := exec.CommandContext(ctx, os.Args[0], "-test.run=^TestDamageChild$", "-test.count=1")
	cmd.Env = append(os.Environ(), fmt.Sprintf("TALLYWARD_DAMAGE=%s|%s|%d|%d", tmpl, typ, from, n))
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	out, err := cmd.Output()
	var outs []damageOutcome
	current := -1
	sc := bufio.NewScanner(bytes.NewReader(out))
	for sc.Scan() {
		f := strings.SplitN(sc.Text(), "|", 4)
		if len(f) < 2 {
			continue
		}
		i, _ := strconv.Atoi(f[1])
		switch f[0] {
		case "BEGIN":
			current = i
		case "OUTCOME":
			outs = append(outs, damageOutcome{trial: i, class: f[2], detail: f[3]})
			current = -1
		}
	}
	if err == nil {
		return outs, n
	}
	require.NotEqual(t, -1, current, "damage child failed outside a trial: %v\n%s\n%s", err, out, stderr.String())
	class := outDied
	if ctx.Err() != nil {
		class = outHung
	}
	tail := stderr.String()
	if len(tail) > 600 {
		tail = tail[:600]
	}
	outs = append(outs, damageOutcome{trial: current, class: class, detail: fmt.Sprintf("%v: %s", err, tail)})
	return outs, current + 1
}

// TestDamageChild is the child side of TestDamageMatrix; it does nothing
// unless started by it.
func TestDamageChild(t *testing.T) {
	env := os.Getenv("TALLYWARD_DAMAGE")
	if env == "" {
		t.Skip("child of TestDamageMatrix only")
	}
	f := strings.Split(env, "|")
	tmpl, typ := f[0], f[1]
	from, _ := strconv.Atoi(f[2])
	n, _ := strconv.Atoi(f[3])
	b, err := os.ReadFile(filepath.Join(tmpl, "digests"))
	require.NoError(t, err)
	digests := map[uint64]string{}
	var last uint64
	for _, l := range strings.Split(string(b), "\n") {
		seq, d, _ := strings.Cut(l, " ")
		s, err := strconv.ParseUint(seq, 10, 64)
		require.NoError(t, err)
		digests[s] = d
		last = max(last, s)
	}
	// The template, read into memory once; each trial works on a copy.
	src := vfs.NewMem()
	_, err = vfs.Clone(vfs.Default, src, filepath.Join(tmpl, "db"), "db")
	require.NoError(t, err)
	ls, err := src.List("db")
	require.NoError(t, err)
	var files []string
	for _, name := range ls {
		switch {
		case typ == "MANIFEST" && strings.HasPrefix(name, "MANIFEST-"),
			typ == "table" && strings.HasSuffix(name, ".sst"),
			typ == "WAL" && strings.HasSuffix(name, ".log"),
			typ == "OPTIONS" && strings.HasPrefix(name, "OPTIONS-"):
			files = append(files, name)
		}
	}
	slices.Sort(files)
	require.NotEmpty(t, files, typ)

	r := rand.New(rand.NewPCG(77, uint64(slices.Index(damageTypes, typ))))
	// A file smaller than the number of trials has every byte damaged
	// (in a seeded order, then again with other values).
	perms := map[string][]int{}
	for i := range n {
		name := files[r.IntN(len(files))]
		st, err := src.Stat(src.PathJoin("db", name))
		require.NoError(t, err)
		pos := r.Int64N(st.Size())
		if st.Size() <= int64(n) {
			if perms[name] == nil {
				perms[name] = r.Perm(int(st.Size()))
			}
			pos = int64(perms[name][i%len(perms[name])])
		}
		flip := byte(1 + r.IntN(255))
		if i < from {
			continue
		}
		fmt.Printf("BEGIN|%d\n", i)
		class, detail := damageTrial(t, src, name, pos, flip, digests, last)
		fmt.Printf("OUTCOME|%d|%s|%s at byte %d: %s\n", i, class, name, pos, strings.ReplaceAll(detail, "\n", " "))
	}
}

// damageTrial flips one byte of a copy of the template and classifies
// what opening and reading the store gives.
func damageTrial(t *testing.T, src *vfs.MemFS, name string, pos int64, flip byte, digests map[uint64]string, last uint64) (string, string) {
	fs := vfs.NewMem()
	_, err := vfs.Clone(src, fs, "db", "db")
	require.NoError(t, err)
	path := fs.PathJoin("db", name)
	f, err := fs.OpenReadWrite(path, vfs.WriteCategoryUnspecified)
	require.NoError(t, err)
	var b [1]byte
	_, err = f.ReadAt(b[:], pos)
	require.NoError(t, err)
	b[0] ^= flip
	_, err = f.WriteAt(b[:], pos)
	require.NoError(t, err)
	require.NoError(t, f.Close())

	p, err := Open(loginSpec(nil), Options{Dir: "db", FS: fs, CommitEvery: -1})
	if err != nil {
		return classifyErr(outOpenError, err)
	}
	defer p.Close()
	got, err := recordDigestErr(p.store.DB())
	if err == nil {
		err = p.store.Err()
	}
	if err != nil {
		return classifyErr(outReadError, err)
	}
	// The pipeline reads on: an event for every existing entity kind.
	if _, err := p.Score(login{T: t0 + int64(time.Hour), Account: "acct-00042", Addr: "10.1.0.42"}, nil); err != nil {
		return classifyErr(outReadError, err)
	}
	seq := p.store.Mark().Seen
	want, ok := digests[seq]
	switch {
	case !ok || got != want:
		return outWrong, fmt.Sprintf("mark %d, records %s, want %s", seq, got, want)
	case seq == last:
		return outIntact, ""
	case p.Stats().RolledBack:
		return outRollback, fmt.Sprintf("to commit at %d of %d; %s", seq, last, strings.Join(p.Notices(), "; "))
	}
	return outSilentBack, fmt.Sprintf("to commit at %d of %d", seq, last)
}

// classifyErr accepts an error that names the damage.
func classifyErr(class string, err error) (string, string) {
	if errors.Is(err, ErrStoreDamaged) || errors.Is(err, store.ErrCorrupt) || pebble.IsCorruptionError(err) {
		return class, err.Error()
	}
	return outUnclear, class + ": " + err.Error()
}

// Erase's promise on the files: after Erase, Compact and Close no file in
// the store's directory holds the key, whether the key had been committed
// before the erasure or was erased before its first commit, with logs
// rotated (and recycled) along the way.
func TestEraseLeavesNoFileBytes(t *testing.T) {
	const victim = "person-erase-me-file-91c2"
	for _, committed := range []bool{true, false} {
		t.Run(fmt.Sprint("committed=", committed), func(t *testing.T) {
			dir := t.TempDir()
			p, err := Open(loginSpec(nil), Options{Dir: dir, CommitEvery: -1, CacheBytes: 64 << 10, MemTableBytes: 256 << 10, IngestThreshold: 500})
			require.NoError(t, err)
			tm := t0
			commits := committed
			feed := func(n int, withVictim bool) {
				for i := range n {
					tm += int64(time.Millisecond)
					acct := fmt.Sprintf("acct-%05d", i)
					if withVictim && i%40 == 0 {
						acct = victim
					}
					require.NoError(t, p.Process(login{T: tm, Account: acct, Addr: "10.0.0.1", OK: true}))
					if commits && i%200 == 199 {
						require.NoError(t, p.Commit(nil))
					}
				}
			}
			feed(4000, true)
			require.NoError(t, p.Erase("account", victim))
			commits = true
			feed(4000, false)
			require.NoError(t, p.Compact())
			require.NoError(t, p.Close())
			for _, f := range listFiles(t, dir) {
				name, _, _ := strings.Cut(f, " ")
				b, err := os.ReadFile(filepath.Join(dir, name))
				require.NoError(t, err)
				require.False(t, bytes.Contains(b, []byte(victim)), "%s holds the erased key", name)
			}
		})
	}
}

// Open on a directory of unrelated files refuses rather than creating a
// store among them; a second Open of a store in use says it is locked.
func TestOpenRefusesForeignDirectoryAndSecondOpen(t *testing.T) {
	dir := t.TempDir()
	require.NoError(t, os.WriteFile(filepath.Join(dir, "report.csv"), []byte("a,b\n"), 0o644))
	_, err := Open(loginSpec(nil), Options{Dir: dir})
	require.ErrorIs(t, err, ErrNotStore)
	require.ErrorContains(t, err, "report.csv")

	dir = filepath.Join(t.TempDir(), "store")
	p, err := Open(loginSpec(nil), Options{Dir: dir})
	require.NoError(t, err)
	_, err = Open(loginSpec(nil), Options{Dir: dir})
	require.ErrorIs(t, err, ErrStoreLocked)
	require.NoError(t, p.Close())
	p, err = Open(loginSpec(nil), Options{Dir: dir})
	require.NoError(t, err)
	require.NoError(t, p.Close())
}

// Damage in the write-ahead log rolls the store back to the last commit
// before it. That used to happen without a word; Open now says so in
// Notices and Stats.RolledBack, and the source resumes from the earlier
// commit's position.
func TestLogDamageRollbackIsReported(t *testing.T) {
	dir := t.TempDir()
	digests := damageStore(t, dir)
	log := storeFile(t, dir, "*.log")
	b, err := os.ReadFile(log)
	require.NoError(t, err)
	b[len(b)*2/3] ^= 0x20
	require.NoError(t, os.WriteFile(log, b, 0o644))

	p, err := Open(loginSpec(nil), Options{Dir: dir})
	require.NoError(t, err)
	defer p.Close()
	st := p.Stats()
	require.True(t, st.RolledBack)
	require.Contains(t, strings.Join(p.Notices(), "\n"), filepath.Base(log))
	require.Less(t, p.ResumeSeq(), uint64(20_500))
	require.Equal(t, digests[p.ResumeSeq()], recordDigest(t, p.store.DB()), "the records of the commit rolled back to")
}
