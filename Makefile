# clef: plain GNU make.  Dependencies come from Debian packages, found with
# pkg-config; `make deps` (run by demo and check) installs what is missing.

BUILD    ?= build
CC       ?= cc
# -march=native lets the compiler use the machine's widest vectors (the
# transform and coupling kernels depend on it); set ARCH= for a portable build.
ARCH     ?= -march=native
CFLAGS   ?= -O3 -g
WERROR   ?=
PREFIX   ?= /usr/local

PKGS     := chealpix cfitsio fftw3 lapacke openblas gsl libcjson cairo nettle
TESTPKGS := cmocka

PKGCFLAGS := $(shell pkg-config --cflags $(PKGS) 2>/dev/null)
PKGLIBS   := $(shell pkg-config --libs $(PKGS) 2>/dev/null) -lfftw3_omp
# MPI (Open MPI from Debian: libopenmpi-dev) for `clef sims` across
# processes; without it the command runs as one process (src/cli/cli_par.c,
# the only file that includes mpi.h, says so when asked for MPI).
MPI_CFLAGS := $(shell pkg-config --cflags ompi-c 2>/dev/null)
MPI_LIBS   := $(shell pkg-config --libs ompi-c 2>/dev/null)
ifeq ($(shell pkg-config --exists ompi-c 2>/dev/null && echo yes),yes)
MPI_DEFS := -DCLEF_HAVE_MPI
else
$(info clef: pkg-config finds no ompi-c: clef sims is built without MPI (one process))
MPI_DEFS :=
endif
TESTCFLAGS := $(shell pkg-config --cflags $(TESTPKGS) 2>/dev/null)
TESTLIBS   := $(shell pkg-config --libs $(TESTPKGS) 2>/dev/null)

ALL_CFLAGS  = -std=c11 $(ARCH) -fPIC -fopenmp -Wall -Wextra -Wshadow $(WERROR) $(CFLAGS) -MMD -MP
ALL_CPPFLAGS = -Iinclude -Isrc $(PKGCFLAGS) $(CPPFLAGS)
ALL_LDFLAGS = -fopenmp $(LDFLAGS)
ALL_LDLIBS  = $(PKGLIBS) -lm $(LDLIBS)

LIB_SRC   := $(wildcard src/*.c)
CLI_SRC   := $(wildcard src/cli/*.c)
TEST_SRC  := $(wildcard tests/test_*.c)
BENCH_SRC := $(wildcard bench/bench_*.c)
FUZZ_SRC  := $(wildcard tests/fuzz/fuzz_*.c)
BENCH_COMMON := $(filter-out $(BENCH_SRC),$(wildcard bench/*.c))

LIB_OBJ   := $(LIB_SRC:%.c=$(BUILD)/%.o)
CLI_OBJ   := $(CLI_SRC:%.c=$(BUILD)/%.o)
TEST_BIN  := $(TEST_SRC:tests/%.c=$(BUILD)/tests/%)
BENCH_BIN := $(BENCH_SRC:bench/%.c=$(BUILD)/bench/%)
REPLAY_BIN := $(FUZZ_SRC:tests/fuzz/%.c=$(BUILD)/fuzz-replay/%)
BENCH_COMMON_OBJ := $(BENCH_COMMON:%.c=$(BUILD)/%.o)

LIBA  := $(BUILD)/libclef.a
LIBSO := $(BUILD)/libclef.so
CLEF  := $(BUILD)/clef

.PHONY: all deps check check-long tests bench demo sanitize clean install fuzz fuzz-ci fuzz-build
.DEFAULT_GOAL := all

all: $(LIBA) $(LIBSO) $(CLEF)

deps:
	@sh scripts/install-deps.sh

$(BUILD)/%.o: %.c
	@mkdir -p $(dir $@)
	$(CC) $(ALL_CPPFLAGS) $(ALL_CFLAGS) -c $< -o $@

$(LIBA): $(LIB_OBJ)
	@mkdir -p $(dir $@)
	rm -f $@ && ar rcs $@ $^

$(LIBSO): $(LIB_OBJ)
	$(CC) -shared $(ALL_LDFLAGS) -o $@ $^ $(ALL_LDLIBS)

$(BUILD)/src/cli/cli_par.o: src/cli/cli_par.c
	@mkdir -p $(dir $@)
	$(CC) $(ALL_CPPFLAGS) $(MPI_DEFS) $(MPI_CFLAGS) $(ALL_CFLAGS) -c $< -o $@

$(CLEF): $(CLI_OBJ) $(LIBA)
	$(CC) $(ALL_LDFLAGS) -o $@ $(CLI_OBJ) $(LIBA) $(ALL_LDLIBS) $(MPI_LIBS)

$(BUILD)/tests/%: tests/%.c tests/check.h $(LIBA)
	@mkdir -p $(dir $@)
	$(CC) $(ALL_CPPFLAGS) $(TESTCFLAGS) $(ALL_CFLAGS) -Itests $< -o $@ $(ALL_LDFLAGS) $(LIBA) $(TESTLIBS) $(ALL_LDLIBS)

$(BUILD)/bench/%: bench/%.c $(BENCH_COMMON_OBJ) $(LIBA)
	@mkdir -p $(dir $@)
	$(CC) $(ALL_CPPFLAGS) $(ALL_CFLAGS) -Ibench $< $(BENCH_COMMON_OBJ) -o $@ $(ALL_LDFLAGS) $(LIBA) $(ALL_LDLIBS)

# Every fuzz harness also links against a plain replay driver, so the
# corpora (seeds and regression inputs) run in make check and make sanitize
# with the project's compiler (tests/cli/fuzz_corpus.sh).
$(BUILD)/fuzz-replay/%: tests/fuzz/%.c tests/fuzz/replay.c tests/fuzz/fuzz.h $(LIBA)
	@mkdir -p $(dir $@)
	$(CC) $(ALL_CPPFLAGS) $(ALL_CFLAGS) -Itests/fuzz tests/fuzz/replay.c $< -o $@ $(ALL_LDFLAGS) $(LIBA) $(ALL_LDLIBS)

tests: all $(TEST_BIN) $(REPLAY_BIN)

# The test suite: every tests/test_*.c program (cmocka) and every
# tests/cli/*.sh script; tests/run.sh prints "N passed, N failed".
check: deps
	@$(MAKE) --no-print-directory tests
	@sh tests/run.sh $(BUILD)

check-long: deps
	@$(MAKE) --no-print-directory tests
	@CLEF_LONG=1 sh tests/run.sh $(BUILD)

# AddressSanitizer + UndefinedBehaviorSanitizer build of the same suite.
sanitize: deps
	@$(MAKE) --no-print-directory BUILD=build-san \
	    CFLAGS="-O1 -g -fsanitize=address,undefined -fno-omit-frame-pointer -fno-sanitize-recover=undefined" \
	    LDFLAGS="-fsanitize=address,undefined" tests
	@CLEF_SANITIZE=1 ASAN_OPTIONS=detect_leaks=1 sh tests/run.sh build-san

# Fuzzing (tests/fuzz/README.md): libFuzzer harnesses built with Debian's
# clang, AddressSanitizer and UndefinedBehaviorSanitizer in build-fuzz/.
# `make fuzz` runs each harness for 10^6 executions or FUZZ_TIME seconds
# (default 1800), whichever comes first; `make fuzz-ci` about 20 s each over
# its corpus (what .ci/run does).  Both fail on any finding.
FUZZ_CFLAGS := -O1 -g -fno-omit-frame-pointer -fsanitize=address,undefined -fno-sanitize-recover=undefined
FUZZ_BIN := $(FUZZ_SRC:tests/fuzz/%.c=build-fuzz/fuzz/%)
FUZZ_TIME ?= 1800

fuzz-build:
	@sh scripts/install-deps.sh --fuzz
	@$(MAKE) --no-print-directory BUILD=build-fuzz CC=clang \
	    CFLAGS="$(FUZZ_CFLAGS) -fsanitize=fuzzer-no-link" LDFLAGS="-fsanitize=address,undefined" fuzz-harnesses

build-fuzz/fuzz/%: tests/fuzz/%.c tests/fuzz/fuzz.h $(LIBA)
	@mkdir -p $(dir $@)
	$(CC) $(ALL_CPPFLAGS) $(ALL_CFLAGS) -fsanitize=fuzzer -Itests/fuzz $< -o $@ $(ALL_LDFLAGS) -fsanitize=fuzzer $(LIBA) $(ALL_LDLIBS)

.PHONY: fuzz-harnesses
fuzz-harnesses: $(FUZZ_BIN)

fuzz: fuzz-build
	@sh tests/fuzz/run.sh long $(FUZZ_TIME)

fuzz-ci: fuzz-build
	@sh tests/fuzz/run.sh ci 20

bench: deps
	@$(MAKE) --no-print-directory all $(BENCH_BIN)
	@sh bench/run.sh $(BUILD)

demo: deps
	@$(MAKE) --no-print-directory all
	@sh scripts/demo.sh $(BUILD)

install: all
	install -d $(DESTDIR)$(PREFIX)/bin $(DESTDIR)$(PREFIX)/lib $(DESTDIR)$(PREFIX)/include/clef $(DESTDIR)$(PREFIX)/lib/pkgconfig
	install -m 755 $(CLEF) $(DESTDIR)$(PREFIX)/bin/clef
	install -m 644 $(LIBA) $(LIBSO) $(DESTDIR)$(PREFIX)/lib/
	install -m 644 include/clef/*.h $(DESTDIR)$(PREFIX)/include/clef/
	sed -e 's|@PREFIX@|$(PREFIX)|' -e 's|@VERSION@|$(shell sed -n 's/^#define CLEF_VERSION "\(.*\)"/\1/p' include/clef/clef.h)|' \
	    -e 's|@PKGS@|$(PKGS)|' clef.pc.in > $(DESTDIR)$(PREFIX)/lib/pkgconfig/clef.pc

clean:
	rm -rf build build-san build-fuzz

-include $(LIB_OBJ:.o=.d) $(CLI_OBJ:.o=.d) $(BENCH_COMMON_OBJ:.o=.d)
