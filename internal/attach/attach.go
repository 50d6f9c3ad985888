// Package attach lets packages of this module that build on a pipeline
// (join/) keep state in the pipeline's store without the store appearing
// in the public API: Open registers each pipeline's store here, Close
// removes it, and such a package looks it up by the pipeline pointer.
package attach

import (
	"sync"

	"github.com/tallyward/tallyward/internal/store"
)

var stores sync.Map // pipeline pointer -> *store.Store

// Register records the store of pipeline p.
func Register(p any, s *store.Store) { stores.Store(p, s) }

// Unregister forgets p.
func Unregister(p any) { stores.Delete(p) }

// Store returns the store of pipeline p, if it is open.
func Store(p any) (*store.Store, bool) {
	s, ok := stores.Load(p)
	if !ok {
		return nil, false
	}
	return s.(*store.Store), true
}
