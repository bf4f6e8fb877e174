.PHONY: test build fmt-check

# Installs what the tests need when missing, then vets and tests everything.
test:
	scripts/setup-test-machine.sh
	go vet ./...
	go test -count=1 ./...

build:
	go build -o bin/qtally .

fmt-check:
	@out=$$(gofmt -l .); if [ -n "$$out" ]; then echo "gofmt needed:"; echo "$$out"; exit 1; fi
