//go:build !linux

package analysis

// lowerThreadPriority does nothing where threads have no priority of their
// own that a program can lower without privileges.
func lowerThreadPriority() {}
