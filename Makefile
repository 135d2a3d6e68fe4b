# heed: build, test, benchmark.
# PYTHON must be an interpreter that imports numpy, h5py, scipy and torch (Debian's).
PYTHON ?= /usr/bin/python3
GO ?= go
FUZZTIME ?= 20s
BIN ?= ./heed

.PHONY: all build build-simd demo deps test check-fmt vet staticcheck unit pytest-capture purego fuzz crosscheck bench clean

all: build

deps:
	@scripts/install-deps.sh

build: deps
	$(GO) build -o $(BIN) ./cmd/heed

# The same with Go's experimental SIMD package (internal/kernels/*_simd.go):
# vector kernels on processors with AVX-512; the default build needs no experiment.
build-simd: deps
	GOEXPERIMENT=simd $(GO) build -o $(BIN) ./cmd/heed

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
