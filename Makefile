# Set-up and test commands; the README names `make demo` and `make test`.
GO        ?= go
BIN       := bin/sidetrend
GOFILES    = $(shell git ls-files '*.go' 2>/dev/null; git ls-files --others --exclude-standard '*.go' 2>/dev/null)

.PHONY: all build test test-long bench fuzz demo postgres fmt-check vet clean

all: build

# The commit goes in with -X as well: Go stamps it itself only when .git is
# a directory (not in a git worktree).
build:
	$(GO) build -ldflags "-X main.commit=$$(git rev-parse HEAD 2>/dev/null)" -o $(BIN) ./cmd/sidetrend

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

# Each fuzz target in turn for FUZZTIME (10 minutes by default:
# `make fuzz FUZZTIME=2m` for a shorter run). -timeout 0: the test binary's
# default 10-minute limit would end a 10-minute run. Inputs that find new
# code are minimized for at most FUZZMINIMIZE each. The estimator's targets
# fail any input that takes more than a second; the endpoint's give each
# input a deadline of their own (and Go ends a worker stuck for 10 s).
# Inputs that fail are written to <package>/testdata/fuzz/<target>/.
FUZZTIME     ?= 10m
FUZZMINIMIZE ?= 10s
FUZZTARGETS  := estimator:FuzzUnmarshalState estimator:FuzzUpdate sqlwire:FuzzParse sqlwire:FuzzMessages

fuzz: postgres
	@set -e; for t in $(FUZZTARGETS); do \
		pkg=$${t%%:*}; fn=$${t##*:}; \
		echo "== $$fn ($$pkg) for $(FUZZTIME)"; \
		$(GO) test -run '^$$' -fuzz "^$$fn\$$" -fuzztime $(FUZZTIME) -fuzzminimizetime $(FUZZMINIMIZE) -timeout 0 ./$$pkg/; \
	done

demo: postgres build
	./$(BIN) demo

clean:
	rm -rf bin
