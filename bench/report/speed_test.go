package report

import (
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
)

// The speed report at a tiny size: every table and the plot are produced,
// and every pass ends holding exactly the population it was given (the
// report's "entities" are the live records at the end). Speed figures
// themselves are never asserted.
func TestSpeedReportTiny(t *testing.T) {
	r := &Report{Title: "speed"}
	c := SpeedConfig{Entities: 2000, Draws: 3000, NaiveEvents: 500, LatencyCalls: 1000, Dir: t.TempDir()}
	if err := Speed(r, c); err != nil {
		t.Fatal(err)
	}
	for _, title := range []string{"Speed: six features over two entity kinds", "Bytes per entity", "Inline Score latency"} {
		if r.Table(title) == nil {
			t.Fatalf("no table %q", title)
		}
	}
	sizes := r.Table("Bytes per entity")
	scales := map[string]int{}
	for _, row := range sizes.Rows {
		if row[0] != row[2] {
			t.Errorf("%s at %s entities: %s live at the end", row[1], row[0], row[2])
		}
		scales[row[0]]++
	}
	if len(scales) != 3 {
		t.Errorf("scales %v, want 200, 2000 and 20000", scales)
	}
	// Every run of every scale has a row per phase.
	speed := r.Table("Speed: six features over two entity kinds")
	if want := 3 * len(sizes.Rows); len(speed.Rows) != want {
		t.Errorf("%d speed rows, want %d", len(speed.Rows), want)
	}
	lat := r.Table("Inline Score latency")
	for _, row := range lat.Rows {
		if row[0] == "all" {
			if n, _ := strconv.Atoi(row[1]); n != 1000+2*1000 {
				t.Errorf("%s latency calls timed, want %d", row[1], 1000+2*1000)
			}
		}
	}
	dir := t.TempDir()
	if err := r.Write(dir); err != nil {
		t.Fatal(err)
	}
	md, err := os.ReadFile(filepath.Join(dir, "report.md"))
	if err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(string(md), "speed.png") {
		t.Error("report does not show the speed plot")
	}
}
