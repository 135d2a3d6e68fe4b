//go:build !cgo || nohdf5

package loader

// HDF5Supported reports whether this build reads HDF5 files.
const HDF5Supported = false

// openHDF5 refuses HDF5 files in a build without cgo (or with the nohdf5
// tag): everything else still opens.
func openHDF5(path string) (Container, error) {
	return nil, &FormatError{File: path, Offset: -1, Msg: "HDF5 file", Err: ErrNoHDF5}
}
