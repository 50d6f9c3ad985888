// Package sketch holds mergeable, versioned summaries with stated error
// bounds for per-entity features: windowed distinct counts, Count-Min
// frequencies, Space-Saving heavy hitters and relative-error quantiles.
package sketch
