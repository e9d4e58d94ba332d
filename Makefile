# Set-up and test commands; the README names `make demo` and `make test`.
GO        ?= go
BIN       := bin/sidetrend
GOFILES    = $(shell git ls-files '*.go' 2>/dev/null; git ls-files --others --exclude-standard '*.go' 2>/dev/null)

.PHONY: all build test test-long bench demo postgres fmt-check vet clean

all: build

build:
	$(GO) build -o $(BIN) ./cmd/sidetrend

postgres:
	@bash scripts/ensure-postgres.sh

fmt-check:
	@out=$$(gofmt -l $(GOFILES)); if [ -n "$$out" ]; then echo "gofmt would change:"; echo "$$out"; exit 1; fi

vet:
	$(GO) vet ./...

# Every test: formatting, vet, unit and database tests (a private Postgres
# is started by the tests themselves). Long fault runs are under test-long.
test: postgres fmt-check vet
	$(GO) test -count=1 -timeout 30m ./...

test-long: postgres fmt-check vet
	SIDETREND_LONG=1 $(GO) test -count=1 -timeout 90m ./...

bench: postgres
	$(GO) test -run '^$$' -bench . -benchmem ./...

demo: postgres build
	./$(BIN) demo

clean:
	rm -rf bin
