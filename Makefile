# heed: build, test, benchmark.
# PYTHON must be an interpreter that imports numpy, h5py, scipy and torch (Debian's).
PYTHON ?= /usr/bin/python3
GO ?= go
# Fuzz budgets: see the fuzz target. FUZZTIME (30s, 5000x, ...) replaces them all.
FUZZTIME ?=
BIN ?= ./heed
# Stamp the binary with the commit it is built from (heed version), whatever GOFLAGS says.
BUILDVCS ?= -buildvcs=auto
# Link the HDF5 library from its static archives (loader/hdf5_static.go): the binary then loads only
# libc and libm, not libhdf5's 37 shared libraries, at every start. `make build HDF5_TAGS=` links
# the shared library instead, as a plain `go build ./cmd/heed` does.
HDF5_TAGS ?= -tags=hdf5static
# Build with Go 1.26's experimental SIMD package on amd64 (internal/kernels/*_simd.go: vector loops
# on processors with AVX2 / AVX-512, chosen at run time; heed version says which run). `make build
# SIMD=` builds the scalar loops only, as a plain `go build ./cmd/heed` does.
SIMD ?= $(if $(filter amd64,$(shell $(GO) env GOARCH)),simd)
# The build command with the experiment, and the same without it when the toolchain refuses it.
gobuild = GOEXPERIMENT=$(SIMD) $(GO) $(1) || { [ -n "$(SIMD)" ] && \
	echo "make: the GOEXPERIMENT=$(SIMD) build failed (above): building the scalar loops" && $(GO) $(1); }

.PHONY: all build install demo deps test check-fmt vet staticcheck unit simd pytest-capture purego static fuzz crosscheck slurm-test bench clean

all: build

deps:
	@scripts/install-deps.sh

build: deps
	$(call gobuild,build $(BUILDVCS) $(HDF5_TAGS) -o $(BIN) ./cmd/heed)

# Installs heed into GOBIN (default GOPATH/bin, i.e. ~/go/bin) from this clone, stamped with its
# commit. Needs only Go (1.26.8 or later); with cgo and libhdf5-dev + pkg-config it reads HDF5 too,
# linked from HDF5's static archives when they are there (Debian's libhdf5-dev has them) and from the
# shared library otherwise; without them it is built without HDF5 support (and says so). Installs no
# packages.
install:
	@if [ "$$($(GO) env CGO_ENABLED)" = 1 ] && pkg-config --exists hdf5 2>/dev/null; then \
		echo "GOEXPERIMENT=$(SIMD) $(GO) install $(BUILDVCS) $(HDF5_TAGS) ./cmd/heed"; \
		$(call gobuild,install $(BUILDVCS) $(HDF5_TAGS) ./cmd/heed) 2>/dev/null || { \
			echo "make install: HDF5's static archives did not link: linking its shared library"; \
			echo "GOEXPERIMENT=$(SIMD) $(GO) install $(BUILDVCS) ./cmd/heed"; $(call gobuild,install $(BUILDVCS) ./cmd/heed); }; \
	else \
		echo "make install: no cgo or no HDF5 library (pkg-config hdf5): building heed without HDF5 support"; \
		echo "CGO_ENABLED=0 GOEXPERIMENT=$(SIMD) $(GO) install $(BUILDVCS) ./cmd/heed"; \
		export CGO_ENABLED=0; $(call gobuild,install $(BUILDVCS) ./cmd/heed); \
	fi
	@bin=$$($(GO) env GOBIN); [ -n "$$bin" ] || bin=$$($(GO) env GOPATH)/bin; \
	echo "installed $$bin/heed: $$($$bin/heed --version)"; \
	case ":$$PATH:" in *":$$bin:"*) ;; *) echo "$$bin is not on your PATH: add it, e.g. export PATH=\"$$bin:\$$PATH\"";; esac

# The main job on the export embedded in the binary.
demo: build
	$(BIN) demo

test: deps check-fmt vet staticcheck unit simd pytest-capture purego static fuzz crosscheck

check-fmt:
	@out=$$(gofmt -l $$(find . -name '*.go' -not -path './.git/*')); \
	if [ -n "$$out" ]; then echo "gofmt would change:"; echo "$$out"; exit 1; fi
	@$(GO) mod tidy -diff >/dev/null || { echo "go.mod/go.sum drift: run go mod tidy"; $(GO) mod tidy -diff; exit 1; }

vet:
	$(GO) vet ./...

# staticcheck at a pinned version, fetched through the module proxy.
staticcheck:
	$(GO) run honnef.co/go/tools/cmd/staticcheck@v0.8.2 ./...

unit:
	HEED_PYTHON=$(PYTHON) $(GO) test -race -count=1 -timeout 30m ./...

# The vector loops make build runs (GOEXPERIMENT=simd): the kernels against their reference loops,
# and the pass that uses them (analysis's tests against numpy, the read paths, shards) once more.
simd:
	@if [ -z "$(SIMD)" ]; then echo "make simd: no SIMD build on $$($(GO) env GOARCH): nothing to test"; exit 0; fi
	HEED_PYTHON=$(PYTHON) GOEXPERIMENT=$(SIMD) $(GO) test -count=1 ./internal/kernels ./analysis/...

# python/heed_capture.py against PyTorch's own outputs and autograd (torch 1.13+, numpy).
pytest-capture:
	$(PYTHON) -m unittest discover -s python -v

# The build without cgo must still build (it refuses HDF5 with a message).
purego:
	CGO_ENABLED=0 $(GO) build -o /dev/null ./cmd/heed
	CGO_ENABLED=0 $(GO) test -count=1 -run 'NoHDF5|PureGo' ./loader

# The build of make build links HDF5 statically: the binary must load no HDF5 (nor curl, TLS...)
# shared library, and the HDF5 tests must pass against the static archives.
static:
	@if [ -z "$(HDF5_TAGS)" ]; then echo "make static: HDF5_TAGS is empty: nothing to check"; exit 0; fi; \
	d=$$(mktemp -d); trap 'rm -rf "$$d"' EXIT; \
	echo "$(GO) build $(HDF5_TAGS) -o $$d/heed ./cmd/heed"; $(GO) build $(HDF5_TAGS) -o $$d/heed ./cmd/heed || exit 1; \
	libs=$$(ldd $$d/heed); echo "$$libs"; \
	if echo "$$libs" | grep -Eq 'libhdf5|libcurl|libcrypto|libsz|libaec'; then \
		echo "make static: the $(HDF5_TAGS) build still loads shared libraries it should have linked statically"; exit 1; fi; \
	echo "$(GO) test -count=1 $(HDF5_TAGS) -run 'HDF5|H5|Fixture' ./loader"; \
	$(GO) test -count=1 $(HDF5_TAGS) -run 'HDF5|H5|Fixture' ./loader

# Each target runs for a count of executions (Nx), about 15-20 s of fuzzing each on a 2-core
# machine: a duration (-fuzztime 20s) races Go's fuzzing coordinator at its deadline and can fail
# with "context deadline exceeded" and no failing input (go.dev/issue/75804, fixed in Go 1.27; seen
# here on FuzzTorch). -fuzzminimizetime bounds the shrinking of a newly interesting input (60 s by
# default), which could otherwise outlast the budget.
fuzzrun = $(GO) test -run '^$$' -fuzz '^$(1)$$' -fuzztime $(or $(FUZZTIME),$(2)) -fuzzminimizetime 5s $(3)
fuzz:
	$(call fuzzrun,FuzzNPY,400000x,./loader)
	$(call fuzzrun,FuzzNPZ,60000x,./loader)
	$(call fuzzrun,FuzzSafetensors,200000x,./loader)
	$(call fuzzrun,FuzzTorch,400000x,./loader)
	$(call fuzzrun,FuzzMeta,400000x,./loader)
	$(call fuzzrun,FuzzTokens,200000x,./cmd/heed)
	$(call fuzzrun,FuzzPartial,300000x,./analysis)
	$(call fuzzrun,FuzzParseLoc,1000000x,./internal/words)

# Regenerate reference data with numpy / h5py / torch and compare with what is committed.
crosscheck:
	$(PYTHON) testdata/gen_fixtures.py --check
	$(PYTHON) testdata/demo/generate.py --check
	$(PYTHON) testdata/hostile/gen.py --check

# The Slurm recipe of docs/scale.md run as written on a one-node cluster on this machine
# (cmd/heed/slurm_test.go; CI runs it after make test). As root it installs slurm-wlm and munge,
# brings the cluster up with scripts/slurm-local.sh and stops it afterwards (unless it was up
# before). When the packages or the cluster cannot be had, it says why and skips the test
# (SLURM_REQUIRED=1 makes that an error); once the cluster is up, a failing test fails.
slurm-test:
	@scripts/install-deps.sh slurm || { \
		echo "slurm-test: SKIPPED: slurm-wlm and munge are missing and could not be installed (above)"; exit $${SLURM_REQUIRED:-0}; }
	@up=0; scripts/slurm-local.sh status >/dev/null 2>&1 && up=1; \
	scripts/slurm-local.sh start || { \
		echo "slurm-test: SKIPPED: no local Slurm cluster: scripts/slurm-local.sh start failed (above)"; exit $${SLURM_REQUIRED:-0}; }; \
	HEED_SLURM=1 HEED_PYTHON=$(PYTHON) $(GO) test -count=1 -timeout 15m -v -run '^TestSlurm' ./cmd/heed; rc=$$?; \
	[ $$up = 1 ] || scripts/slurm-local.sh stop; exit $$rc

# Whole-process timing and memory figures (bench/main.go says what is measured).
# Exports are written once with numpy into HEED_BENCH_DIR or /tmp/heed-bench
# (never committed); make bench BENCH_FLAGS=-big=false skips the 4 GiB export.
bench: build
	$(GO) run ./bench -heed $(BIN) -python $(PYTHON) $(BENCH_FLAGS)

clean:
	rm -f $(BIN)
