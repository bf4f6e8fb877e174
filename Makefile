.PHONY: test build fmt-check bench

# Installs what the tests need when missing, vets and tests everything, then
# runs every benchmark once so that none of them rots.
test:
	scripts/setup-test-machine.sh
	go vet ./...
	go test -count=1 ./...
	go test -count=1 -run '^$$' -bench . -benchtime=1x ./...

build:
	go build -o bin/qtally .

fmt-check:
	@out=$$(gofmt -l .); if [ -n "$$out" ]; then echo "gofmt needed:"; echo "$$out"; exit 1; fi

# Measures the service against this machine's ceilings (BENCHMARKS.md).
# Options go in BENCH_ARGS, e.g. make bench BENCH_ARGS="--quick".
bench:
	scripts/bench.sh $(BENCH_ARGS)
