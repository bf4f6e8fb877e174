.PHONY: test build fmt-check

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
