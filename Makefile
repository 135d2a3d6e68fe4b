# heed: build, test, benchmark.
# PYTHON must be an interpreter that imports numpy, h5py, scipy and torch (Debian's).
PYTHON ?= /usr/bin/python3
GO ?= go
FUZZTIME ?= 20s
BIN ?= ./heed
# Stamp the binary with the commit it is built from (heed version), whatever GOFLAGS says.
BUILDVCS ?= -buildvcs=auto

.PHONY: all build install demo deps test check-fmt vet staticcheck unit pytest-capture purego fuzz crosscheck bench clean

all: build

deps:
	@scripts/install-deps.sh

build: deps
	$(GO) build $(BUILDVCS) -o $(BIN) ./cmd/heed

# Installs heed into GOBIN (default GOPATH/bin, i.e. ~/go/bin) from this clone, stamped with its
# commit. Needs only Go (1.26.8 or later); with cgo and libhdf5-dev + pkg-config it reads HDF5 too,
# without them it is built without HDF5 support (and says so). Installs no packages.
install:
	@if [ "$$($(GO) env CGO_ENABLED)" = 1 ] && pkg-config --exists hdf5 2>/dev/null; then \
		echo "$(GO) install $(BUILDVCS) ./cmd/heed"; $(GO) install $(BUILDVCS) ./cmd/heed; \
	else \
		echo "make install: no cgo or no HDF5 library (pkg-config hdf5): building heed without HDF5 support"; \
		echo "CGO_ENABLED=0 $(GO) install $(BUILDVCS) ./cmd/heed"; CGO_ENABLED=0 $(GO) install $(BUILDVCS) ./cmd/heed; \
	fi
	@bin=$$($(GO) env GOBIN); [ -n "$$bin" ] || bin=$$($(GO) env GOPATH)/bin; \
	echo "installed $$bin/heed: $$($$bin/heed --version)"; \
	case ":$$PATH:" in *":$$bin:"*) ;; *) echo "$$bin is not on your PATH: add it, e.g. export PATH=\"$$bin:\$$PATH\"";; esac

# The main job on the export embedded in the binary.
demo: build
	$(BIN) demo

test: deps check-fmt vet staticcheck unit pytest-capture purego fuzz crosscheck

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

# python/heed_capture.py against PyTorch's own outputs and autograd (torch 1.13+, numpy).
pytest-capture:
	$(PYTHON) -m unittest discover -s python -v

# The build without cgo must still build (it refuses HDF5 with a message).
purego:
	CGO_ENABLED=0 $(GO) build -o /dev/null ./cmd/heed
	CGO_ENABLED=0 $(GO) test -count=1 -run 'NoHDF5|PureGo' ./loader

fuzz:
	$(GO) test -run '^$$' -fuzz '^FuzzNPY$$' -fuzztime $(FUZZTIME) ./loader
	$(GO) test -run '^$$' -fuzz '^FuzzNPZ$$' -fuzztime $(FUZZTIME) ./loader
	$(GO) test -run '^$$' -fuzz '^FuzzSafetensors$$' -fuzztime $(FUZZTIME) ./loader
	$(GO) test -run '^$$' -fuzz '^FuzzTorch$$' -fuzztime $(FUZZTIME) ./loader

# Regenerate reference data with numpy / h5py / torch and compare with what is committed.
crosscheck:
	$(PYTHON) testdata/gen_fixtures.py --check
	$(PYTHON) testdata/demo/generate.py --check
	$(PYTHON) testdata/hostile/gen.py --check

# Whole-process timing and memory figures (bench/main.go says what is measured).
# Exports are written once with numpy into HEED_BENCH_DIR or /tmp/heed-bench
# (never committed); make bench BENCH_FLAGS=-big=false skips the 4 GiB export.
bench: build
	$(GO) run ./bench -heed $(BIN) -python $(PYTHON) $(BENCH_FLAGS)

clean:
	rm -f $(BIN)
