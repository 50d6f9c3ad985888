package sketch

import "github.com/cespare/xxhash/v2"

// HashAlgorithm names the item hash every format version of this package
// that stores hashes is defined under: XXH64 with seed 0. Changing it
// requires new format versions for every kind that stores hashes.
const HashAlgorithm = "XXH64 seed 0"

// Hash returns the 64-bit item hash of b (XXH64, seed 0). It does not
// allocate. Items are identified by this hash everywhere in the package: two
// items with equal hashes are the same item.
func Hash(b []byte) uint64 { return xxhash.Sum64(b) }

// HashString is Hash for a string, without converting it to a byte slice.
func HashString(s string) uint64 { return xxhash.Sum64String(s) }

// mix64 is a bijective 64-bit finaliser (the murmur3 fmix64 constants).
// It derives independent-looking row hashes from one item hash and a fixed
// per-row seed.
func mix64(x uint64) uint64 {
	x ^= x >> 33
	x *= 0xff51afd7ed558ccd
	x ^= x >> 33
	x *= 0xc4ceb9fe1a85ec53
	x ^= x >> 33
	return x
}
