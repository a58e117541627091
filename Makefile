# clef: plain GNU make.  Dependencies come from Debian packages, found with
# pkg-config; `make deps` (run by demo and check) installs what is missing.

BUILD    ?= build
CC       ?= cc
# The default build runs on any CPU of the target architecture: the hot
# kernels are built once per vector width with their own flags (KFLAGS
# below) and chosen at run time (include/clef/kernel.h).  ARCH adds flags
# for everything else, e.g. `make ARCH=-march=native` for a binary that
# only runs on machines like this one.
ARCH     ?=
CFLAGS   ?= -O3 -g
WERROR   ?=
PREFIX   ?= /usr/local

PKGS     := chealpix cfitsio fftw3 lapacke openblas gsl libcjson cairo nettle yaml-0.1
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

# Per-width kernel objects (src/*_avx512.c, src/*_avx2.c, src/*_base.c,
# and the benchmark's FMA reference loops bench/fma_*.c).
# On x86 each gets its instruction set, whatever ARCH says (AVX2 without
# AVX-512, base without AVX), so every path is what a CPU of that width
# runs; elsewhere they get no flags and only the baseline has code.
TARGET_MACHINE := $(shell $(CC) -dumpmachine 2>/dev/null)
ifneq ($(filter x86_64% i386% i486% i586% i686% amd64%,$(TARGET_MACHINE)),)
KFLAGS_avx512 := -mavx512f -mavx512dq -mavx512vl -mavx2 -mfma
KFLAGS_avx2   := -mno-avx512f -mavx2 -mfma
KFLAGS_base   := -mno-fma -mno-avx
endif
$(BUILD)/%_avx512.o: KFLAGS = $(KFLAGS_avx512)
$(BUILD)/%_avx2.o: KFLAGS = $(KFLAGS_avx2)
$(BUILD)/%_base.o: KFLAGS = $(KFLAGS_base)

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

# The Python module (docs/python.md): an extension over libclef.a for
# Debian's /usr/bin/python3, with numpy's C API, in $(BUILD)/python/clef.
PYTHON    ?= /usr/bin/python3
PY_INC    := $(shell $(PYTHON) -c "import sysconfig; print(sysconfig.get_paths()['include'])" 2>/dev/null)
PY_NUMPY  := $(shell $(PYTHON) -c "import numpy; print(numpy.get_include())" 2>/dev/null)
PY_EXT    := $(shell $(PYTHON) -c "import sysconfig; print(sysconfig.get_config_var('EXT_SUFFIX'))" 2>/dev/null)
PY_SITE   := $(shell $(PYTHON) -c "import sys; print('python%d.%d' % sys.version_info[:2])" 2>/dev/null)
PY_OK     := $(and $(PY_NUMPY),$(PY_EXT),$(wildcard $(PY_INC)/Python.h))
PY_SRC    := $(wildcard python/src/*.c)
PY_OBJ    := $(PY_SRC:%.c=$(BUILD)/%.o)
PY_FILES  := $(wildcard python/clef/*.py python/clef/*.pyi python/clef/py.typed)
PY_DIR    := $(BUILD)/python/clef
PY_MOD    := $(PY_DIR)/_clef$(PY_EXT)
PY_COPIES := $(PY_FILES:python/clef/%=$(PY_DIR)/%)

LIBA  := $(BUILD)/libclef.a
LIBSO := $(BUILD)/libclef.so
CLEF  := $(BUILD)/clef

.PHONY: python all deps check check-long tests bench demo diag-peak sanitize clean install fuzz fuzz-ci fuzz-build
.DEFAULT_GOAL := all

all: $(LIBA) $(LIBSO) $(CLEF)

deps:
	@sh scripts/install-deps.sh

$(BUILD)/%.o: %.c
	@mkdir -p $(dir $@)
	$(CC) $(ALL_CPPFLAGS) $(ALL_CFLAGS) $(KFLAGS) -c $< -o $@

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

# `make python` builds the module when /usr/bin/python3 has its headers
# and numpy (scripts/install-deps.sh installs both); otherwise it says why
# and the Python tests skip (tests/cli/python.sh).
ifneq ($(PY_OK),)
python: $(PY_MOD) $(PY_COPIES)
else
python:
	@echo "clef: Python module not built: $(PYTHON) lacks Python.h or numpy (install python3-dev and python3-numpy: scripts/install-deps.sh)"
endif

$(PY_OBJ): ALL_CPPFLAGS += -isystem $(PY_INC) -isystem $(PY_NUMPY) -Ipython/src
$(PY_OBJ): python/src/pyclef.h

$(PY_MOD): $(PY_OBJ) $(LIBA)
	@mkdir -p $(dir $@)
	$(CC) -shared $(ALL_LDFLAGS) -o $@ $(PY_OBJ) $(LIBA) $(ALL_LDLIBS)

$(PY_DIR)/%: python/clef/%
	@mkdir -p $(dir $@)
	cp $< $@

tests: all $(TEST_BIN) $(REPLAY_BIN) python

# The test suite: every tests/test_*.c program (cmocka) and every
# tests/cli/*.sh script; tests/run.sh prints "N passed, N failed".  Then
# tests/kernels.sh repeats the kernel-heavy part with each narrower kernel
# forced (CLEF_KERNEL=avx2, =base).
check: deps
	@$(MAKE) --no-print-directory tests
	@s=0; sh tests/run.sh $(BUILD) || s=1; sh tests/kernels.sh $(BUILD) || s=1; exit $$s

# Diagnostic behind docs/peak.md's first-peak error figures (asserts nothing).
diag-peak: $(BUILD)/tests/diag/peak_cov $(BUILD)/tests/diag/peak_resp

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
	@$(MAKE) --no-print-directory all python $(BENCH_BIN)
	@sh bench/run.sh $(BUILD)

demo: deps
	@$(MAKE) --no-print-directory all
	@sh scripts/demo.sh $(BUILD)

install: all python
	install -d $(DESTDIR)$(PREFIX)/bin $(DESTDIR)$(PREFIX)/lib $(DESTDIR)$(PREFIX)/include/clef $(DESTDIR)$(PREFIX)/lib/pkgconfig
	install -m 755 $(CLEF) $(DESTDIR)$(PREFIX)/bin/clef
	install -m 644 $(LIBA) $(LIBSO) $(DESTDIR)$(PREFIX)/lib/
	install -m 644 include/clef/*.h $(DESTDIR)$(PREFIX)/include/clef/
	sed -e 's|@PREFIX@|$(PREFIX)|' -e 's|@VERSION@|$(shell sed -n 's/^#define CLEF_VERSION "\(.*\)"/\1/p' include/clef/clef.h)|' \
	    -e 's|@PKGS@|$(PKGS)|' clef.pc.in > $(DESTDIR)$(PREFIX)/lib/pkgconfig/clef.pc
	@if [ -f $(PY_MOD) ]; then \
	    echo install -d $(DESTDIR)$(PREFIX)/lib/$(PY_SITE)/dist-packages/clef; \
	    install -d $(DESTDIR)$(PREFIX)/lib/$(PY_SITE)/dist-packages/clef && \
	    install -m 644 $(PY_MOD) $(PY_COPIES) $(DESTDIR)$(PREFIX)/lib/$(PY_SITE)/dist-packages/clef/; \
	fi

clean:
	rm -rf build build-san build-fuzz

-include $(LIB_OBJ:.o=.d) $(CLI_OBJ:.o=.d) $(BENCH_COMMON_OBJ:.o=.d) $(PY_OBJ:.o=.d)
