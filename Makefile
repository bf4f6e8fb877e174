.PHONY: test lint build fmt-check dev screenshot image bench release

# Installs what the tests need when missing, vets and lints (.golangci.yml;
# any finding fails) and tests everything, then runs every benchmark once
# (-short: smaller volumes) so that none of them rots.
test:
	scripts/setup-test-machine.sh
	go vet ./...
	bin/golangci-lint run
	go test -count=1 -parallel 4 ./...
	go test -count=1 -short -run '^$$' -bench . -benchtime=1x ./...

# The linters alone, installing the pinned golangci-lint into bin/ first.
lint:
	scripts/setup-test-machine.sh golangci-lint
	bin/golangci-lint run

build:
	go build -o bin/qtally ./cmd/qtally

fmt-check:
	@out=$$(gofmt -l .); if [ -n "$$out" ]; then echo "gofmt needed:"; echo "$$out"; exit 1; fi

# Runs qtally with its demo on a private PostgreSQL, installing PostgreSQL
# first when it is missing.
dev:
	scripts/setup-test-machine.sh postgresql
	go run ./cmd/qtally dev --demo

# Runs the demo as `make dev` does, on a private PostgreSQL, and saves the
# policy page as headless Chromium shows it: docs/images/policy-page.png, the
# README's picture (the test also checks the learning curve on the way).
screenshot:
	scripts/setup-test-machine.sh postgresql chromium
	QTALLY_SCREENSHOT_DEMO=full go test -count=1 -run '^TestLearningCurveInBrowser$$' ./internal/systemtest
	mkdir -p docs/images
	cp test-output/policy-page.png docs/images/policy-page.png

# Container image (deploy/Dockerfile); needs a Docker engine.
IMAGE ?= qtally:dev
VERSION ?= $(shell git describe --tags --always --dirty 2>/dev/null || echo dev)
COMMIT ?= $(shell git rev-parse HEAD 2>/dev/null || echo unknown)
GO_VERSION ?= $(shell go env GOVERSION | sed 's/^go//')
image:
	docker build -f deploy/Dockerfile --build-arg GO_VERSION=$(GO_VERSION) --build-arg VERSION=$(VERSION) --build-arg COMMIT=$(COMMIT) -t $(IMAGE) .

# Release binaries and archives in $(DIST), with sha256sums; reproducible
# from the same commit and Go toolchain (docs/operations.md, "Releases").
DIST ?= dist
RELEASE_PLATFORMS ?= linux/amd64 linux/arm64
SOURCE_DATE_EPOCH ?= $(shell git log -1 --format=%ct 2>/dev/null || echo 0)
release:
	DIST='$(DIST)' VERSION='$(VERSION)' COMMIT='$(COMMIT)' SOURCE_DATE_EPOCH='$(SOURCE_DATE_EPOCH)' PLATFORMS='$(RELEASE_PLATFORMS)' scripts/release.sh

# Measures the service against this machine's ceilings (BENCHMARKS.md).
# Options go in BENCH_ARGS, e.g. make bench BENCH_ARGS="--quick".
bench:
	scripts/bench.sh $(BENCH_ARGS)
