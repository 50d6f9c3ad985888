package join

import (
	"iter"

	"github.com/tallyward/tallyward"
)

// Either holds one event of two streams of different Go types, so that
// they can feed one pipeline (a pipeline has one event type) without a
// union type written by hand. Exactly one side is set: B when IsB.
//
// Spec functions for it are built from one function per side with Both;
// IsA and IsB select the sides for the joins.
type Either[A, B any] struct {
	A   A `json:"a,omitempty"`
	B   B `json:"b,omitempty"`
	IsB bool
}

// OfA wraps an event of the first stream.
func OfA[A, B any](a A) Either[A, B] { return Either[A, B]{A: a} }

// OfB wraps an event of the second stream.
func OfB[A, B any](b B) Either[A, B] { return Either[A, B]{B: b, IsB: true} }

// IsA reports whether e is from the first stream.
func IsA[A, B any](e Either[A, B]) bool { return !e.IsB }

// IsB reports whether e is from the second stream.
func IsB[A, B any](e Either[A, B]) bool { return e.IsB }

// Both makes one function over Either from one function per side: for
// Spec.Time, Entity.Key, Feature.Where and the joins' Key and ID
// functions. A nil side yields the zero value for that side (an entity key
// of "" names no entity).
func Both[A, B, T any](fa func(A) T, fb func(B) T) func(Either[A, B]) T {
	return func(e Either[A, B]) T {
		var zero T
		if e.IsB {
			if fb == nil {
				return zero
			}
			return fb(e.B)
		}
		if fa == nil {
			return zero
		}
		return fa(e.A)
	}
}

// Merge interleaves two sources, each in time order (or within the
// pipeline's allowed disorder), by time; at equal times the first stream
// comes first. A source error stops the merge and is passed on.
func Merge[A, B any](a tallyward.Source[A], ta func(A) int64, b tallyward.Source[B], tb func(B) int64) tallyward.Source[Either[A, B]] {
	return func(yield func(Either[A, B], error) bool) {
		na, sa := iter.Pull2(iter.Seq2[A, error](a))
		defer sa()
		nb, sb := iter.Pull2(iter.Seq2[B, error](b))
		defer sb()
		av, aerr, aok := na()
		bv, berr, bok := nb()
		for aok || bok {
			if aok && aerr != nil {
				yield(Either[A, B]{}, aerr)
				return
			}
			if bok && berr != nil {
				yield(Either[A, B]{}, berr)
				return
			}
			if aok && (!bok || ta(av) <= tb(bv)) {
				if !yield(OfA[A, B](av), nil) {
					return
				}
				av, aerr, aok = na()
				continue
			}
			if !yield(OfB[A](bv), nil) {
				return
			}
			bv, berr, bok = nb()
		}
	}
}
