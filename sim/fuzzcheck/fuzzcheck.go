// Package fuzzcheck holds what the decoders' fuzz tests share: measuring
// what one decode allocates, to hold it to the decoder's documented bound.
package fuzzcheck

import "runtime"

// Allocated runs fn and returns the bytes allocated meanwhile (by fn, and
// by anything else running then: fuzz workers run one input at a time).
func Allocated(fn func()) uint64 {
	var a, b runtime.MemStats
	runtime.ReadMemStats(&a)
	fn()
	runtime.ReadMemStats(&b)
	return b.TotalAlloc - a.TotalAlloc
}
