package loader

// Set is what the commands open: one or more examples of the same model
// layout (each an Export), opened lazily one at a time so that thousands of
// exported examples can be aggregated without holding them all open.
//
// Grouping rule (OpenSet): each path argument is a file, a directory, or a
// list file ("@LIST": one path a line). Files whose array names do not collide
// are assembled into one export (a directory of per-layer files is one
// example); when names collide (every file holds a whole export), each file
// is its own example.
type Set struct {
	// Examples holds, per example, the files it is assembled from.
	Examples [][]string
	opt      Options
}

// Len is the number of examples.
func (s *Set) Len() int { return len(s.Examples) }
