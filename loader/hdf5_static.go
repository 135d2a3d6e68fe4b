//go:build cgo && !nohdf5 && linux && hdf5static

package loader

// With the hdf5static tag (make build, make install) the HDF5 library is
// linked from its static archives, so the linker takes only the objects heed
// reaches. Linked as a shared library, Debian's libhdf5 loads about 37 more
// shared libraries at every start (curl, TLS, Kerberos, LDAP: its read-only
// S3 driver, which heed never uses) whether or not the process opens an HDF5
// file; from the archives only the szip (libaec) and zlib filters come
// along, linked statically as well. --as-needed then drops the shared
// -lhdf5 that pkg-config names later on the link line: nothing is left for
// it to resolve. docs/scale.md has the figures; make static checks the
// result with ldd.

/*
#cgo LDFLAGS: -Wl,--as-needed -Wl,-Bstatic -lhdf5 -lsz -laec -lz -Wl,-Bdynamic -lm -ldl
*/
import "C"
