# Stopcock build. The programs find DATADIR at run time beside themselves
# (PREFIX/bin/../share/stopcock, daemon/lib/datadir.h), so `make install` with
# any PREFIX or DESTDIR installs the binaries `make all` built, unchanged; the
# DATADIR compiled in is only the last resort.
# `make check` and `make demo` each install missing Debian
# packages first (when run as root), so either is one command on a fresh
# Debian 12 machine.

PREFIX ?= /usr/local
BINDIR ?= $(PREFIX)/bin
SBINDIR ?= $(PREFIX)/sbin
DATADIR ?= $(PREFIX)/share/stopcock
MANDIR ?= $(PREFIX)/share/man
DOCDIR ?= $(PREFIX)/share/doc/stopcock
SYSCONFDIR ?= /etc
UNITDIR ?= /lib/systemd/system
DESTDIR ?=

CC ?= cc
PYTHON ?= /usr/bin/python3
BUILD ?= build
PYTEST_WORKERS ?= 4

PKGS := libserialport libmodbus yaml-0.1 libmicrohttpd sqlite3 jansson libsystemd nettle libcurl \
	libmosquitto pangocairo cairo-pdf fontconfig

# Debian packages the build, the tests, the demo and the benchmarks need.
# python3-serial-asyncio: pymodbus 3.0 imports it even for TCP; it is only a
# Recommends, which --no-install-recommends skips.
DEB_PKGS := build-essential pkg-config libserialport-dev libmodbus-dev libyaml-dev \
	libmicrohttpd-dev libsqlite3-dev libjansson-dev libsystemd-dev nettle-dev libcurl4-openssl-dev \
	libmosquitto-dev mosquitto mosquitto-clients python3-paho-mqtt openssl \
	libcairo2-dev libpango1.0-dev poppler-utils \
	python3 python3-pytest python3-pytest-xdist python3-pymodbus python3-serial-asyncio python3-serial python3-scipy \
	curl wrk valgrind sqlite3 man-db groff-base clang libclang-rt-14-dev \
	python3-yaml systemd strace chromium fonts-dejavu-core nodejs cppcheck clang-format

VERSION := 0.1.0
PKG_CFLAGS = $(shell pkg-config --cflags $(PKGS))
PKG_LIBS = $(shell pkg-config --libs $(PKGS))

WARN := -Wall -Wextra -Werror -Wshadow -Wformat=2 -Wstrict-prototypes -Wmissing-prototypes
BASE_CFLAGS = -std=c17 -D_GNU_SOURCE -DSTOPCOCK_VERSION='"$(VERSION)"' \
	-DSTOPCOCK_DATADIR='"$(DATADIR)"' $(WARN) $(PKG_CFLAGS)
REL_CFLAGS = $(BASE_CFLAGS) -O2 -g
SAN_FLAGS := -fsanitize=address,undefined -fno-sanitize-recover=undefined -fno-omit-frame-pointer
SAN_CFLAGS = $(BASE_CFLAGS) -O1 -g $(SAN_FLAGS)
LDLIBS = $(PKG_LIBS) -lpthread -lm

# ---- layers (docs/architecture.md) ----
# Each folder sees only the headers of the layers it may use, so a forbidden
# #include fails to compile; tests/lint/layers.py says which rule it broke.
#   lib                       nothing of ours
#   drivers, chem, store      lib
#   core                      lib chem
#   cli                       lib chem core drivers
#   sim                       lib chem drivers
#   server                    everything but cli and sim
LAYERS := lib chem core store server cli sim
INC_lib := -Idaemon/lib
INC_drivers := $(INC_lib) -Idrivers
INC_chem := $(INC_lib) -Idaemon/chem
INC_store := $(INC_lib) -Idaemon/store
INC_core := $(INC_chem) -Idaemon/core
INC_cli := $(INC_core) -Idrivers -Idaemon/cli
INC_sim := $(INC_chem) -Idrivers -Idaemon/sim
INC_server := $(INC_core) -Idrivers -Idaemon/store -Idaemon/server
# Tests, benchmarks and fuzz targets reach every layer.
INC_tests := $(INC_server) -Idaemon/cli -Idaemon/sim -Itests/unit -Itests/speed
layer_of = $(if $(filter drivers/%,$(1)),drivers,$(if $(filter tests/%,$(1)),tests,$(word 2,$(subst /, ,$(1)))))
inc_for = $(INC_$(call layer_of,$(1)))

MAIN_SRC := daemon/server/stopcockd.c daemon/cli/stopcock.c daemon/sim/stopcock_sim.c
LIB_SRC = $(filter-out $(MAIN_SRC),$(sort $(foreach l,$(LAYERS),$(wildcard daemon/$(l)/*.c)) \
	$(wildcard drivers/*.c)))
UNIT_SRC = $(sort $(wildcard tests/unit/*.c))
SPEED_SRC = $(sort $(wildcard tests/speed/*.c))

REL := $(BUILD)/rel
SAN := $(BUILD)/san

rel_obj = $(patsubst %.c,$(REL)/%.o,$(1))
san_obj = $(patsubst %.c,$(SAN)/%.o,$(1))

PROGS := stopcockd stopcock stopcock-sim
REL_BINS := $(addprefix $(BUILD)/bin/,$(PROGS))
SAN_BINS := $(addprefix $(SAN)/bin/,$(PROGS))

export ASAN_OPTIONS := detect_leaks=1:abort_on_error=1
export UBSAN_OPTIONS := print_stacktrace=1:halt_on_error=1

.PHONY: all check check-run unit unit-valgrind pytest demo bench bench-run deps install \
	uninstall clean format format-check lint layers san fuzz soak

all: $(REL_BINS)

san: $(SAN_BINS) $(SAN)/unit_tests

# ---- objects (-MMD: each object also depends on the headers it includes; and on this
# Makefile, whose flags and include paths shape every object) ----
$(REL)/%.o: %.c Makefile
	@mkdir -p $(dir $@)
	$(CC) $(REL_CFLAGS) $(call inc_for,$<) -MMD -MP -c $< -o $@

$(SAN)/%.o: %.c Makefile
	@mkdir -p $(dir $@)
	$(CC) $(SAN_CFLAGS) $(call inc_for,$<) -MMD -MP -c $< -o $@

-include $(shell find $(BUILD) -name '*.d' 2>/dev/null)

$(REL)/libstopcock.a: $(call rel_obj,$(LIB_SRC))
	@rm -f $@
	ar rcs $@ $^

$(SAN)/libstopcock.a: $(call san_obj,$(LIB_SRC))
	@rm -f $@
	ar rcs $@ $^

# ---- programs ----
$(BUILD)/bin/stopcockd: $(REL)/daemon/server/stopcockd.o $(REL)/libstopcock.a
$(BUILD)/bin/stopcock: $(REL)/daemon/cli/stopcock.o $(REL)/libstopcock.a
$(BUILD)/bin/stopcock-sim: $(REL)/daemon/sim/stopcock_sim.o $(REL)/libstopcock.a
$(REL_BINS):
	@mkdir -p $(dir $@)
	$(CC) $(REL_CFLAGS) $^ -o $@ $(LDLIBS)

$(SAN)/bin/stopcockd: $(SAN)/daemon/server/stopcockd.o $(SAN)/libstopcock.a
$(SAN)/bin/stopcock: $(SAN)/daemon/cli/stopcock.o $(SAN)/libstopcock.a
$(SAN)/bin/stopcock-sim: $(SAN)/daemon/sim/stopcock_sim.o $(SAN)/libstopcock.a
$(SAN_BINS):
	@mkdir -p $(dir $@)
	$(CC) $(SAN_CFLAGS) $^ -o $@ $(LDLIBS)

# ---- unit tests: one binary, every tests/unit/*.c ----
$(SAN)/unit_tests: $(call san_obj,$(UNIT_SRC)) $(SAN)/libstopcock.a
	$(CC) $(SAN_CFLAGS) $^ -o $@ $(LDLIBS)

$(REL)/unit_tests: $(call rel_obj,$(UNIT_SRC)) $(REL)/libstopcock.a
	$(CC) $(REL_CFLAGS) $^ -o $@ $(LDLIBS)

$(REL)/speed: $(call rel_obj,$(SPEED_SRC)) $(REL)/libstopcock.a
	$(CC) $(REL_CFLAGS) $^ -o $@ $(LDLIBS)

# ---- Debian packages ----
deps:
	@missing=""; for p in $(DEB_PKGS); do \
	  dpkg-query -W -f='$${Status}\n' $$p 2>/dev/null | grep -q '^install ok installed' \
	    || missing="$$missing $$p"; done; \
	if [ -z "$$missing" ]; then echo "deps: all Debian packages present"; \
	elif [ "$$(id -u)" = 0 ]; then echo "deps: installing$$missing"; \
	  apt-get update && DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends $$missing; \
	else echo "deps: missing Debian packages; run as root:"; \
	  echo "  apt-get update && apt-get install -y$$missing"; exit 1; fi
	@# The browser tests drive Debian's chromium with playwright-core (version
	@# pinned in tests/web/package.json). Node's own npm, else Debian's.
	@command -v npm >/dev/null 2>&1 || [ "$$(id -u)" != 0 ] || \
	  DEBIAN_FRONTEND=noninteractive apt-get install -y --no-install-recommends npm
	@[ -d tests/web/node_modules/playwright-core ] || \
	  npm install --prefix tests/web --no-package-lock --no-audit --no-fund

# ---- tests ----
check: deps
	@$(MAKE) --no-print-directory check-run

# Unit tests under ASan+UBSan, the same under valgrind (release build), then
# the end-to-end tests against real processes. Nothing skips silently.
check-run: all san $(REL)/unit_tests
	@echo "== layers, lint (cppcheck) and format (clang-format)"
	@$(MAKE) --no-print-directory layers lint format-check
	@echo "== unit tests (AddressSanitizer + UBSan)"
	$(SAN)/unit_tests
	@echo "== unit tests (valgrind)"
	STOPCOCK_QUICK=1 valgrind -q --leak-check=full --error-exitcode=1 $(REL)/unit_tests
	@echo "== fuzzing (libFuzzer, $(CHECK_FUZZ_SECONDS) s per target, two at a time)"
	@$(MAKE) --no-print-directory fuzz FUZZ_SECONDS=$(CHECK_FUZZ_SECONDS)
	@echo "== end-to-end tests ($(PYTEST_WORKERS) at a time: they mostly wait on the bench's real time)"
	@rm -f $(BUILD)/figures.txt
	STOPCOCK_BUILD=$(abspath $(BUILD)) STOPCOCK_FIGURES=$(abspath $(BUILD))/figures.txt \
	  $(PYTHON) -m pytest -q -p no:cacheprovider -n $(PYTEST_WORKERS) --dist loadfile --durations=12 tests
	@echo "== reliability figures (docs/reliability.md)"
	@cat $(BUILD)/figures.txt 2>/dev/null || true

unit: $(SAN)/unit_tests
	$(SAN)/unit_tests $(T)

pytest: all san
	STOPCOCK_BUILD=$(abspath $(BUILD)) $(PYTHON) -m pytest -q -p no:cacheprovider $(if $(T),$(T),tests)

# ---- demo and speed figures ----
demo: deps
	@$(MAKE) --no-print-directory all
	@bash tests/e2e/demo.sh $(abspath $(BUILD))

bench: deps
	@$(MAKE) --no-print-directory bench-run

bench-run: all $(REL)/speed
	$(REL)/speed
	@if [ -f tests/speed/speed_http.sh ]; then bash tests/speed/speed_http.sh $(abspath $(BUILD)); fi
	$(PYTHON) tests/speed/speed_mqtt.py $(abspath $(BUILD))

# ---- fuzzing: libFuzzer targets tests/fuzz/fuzz_*.c (clang, ASan+UBSan) ----
# `make fuzz FUZZ_SECONDS=N` replays tests/fuzz/regress/<target>/, then fuzzes
# each target for N s from tests/fuzz/corpus/<target>/ (docs/reliability.md).
FUZZ_SECONDS ?= 30
CHECK_FUZZ_SECONDS ?= 30
FUZZ_CC ?= clang
FUZZ := $(BUILD)/fuzz
FUZZ_TARGETS = $(patsubst tests/fuzz/fuzz_%.c,%,$(sort $(wildcard tests/fuzz/fuzz_*.c)))
FUZZ_CFLAGS = $(filter-out -Werror,$(BASE_CFLAGS)) -O1 -g -fno-omit-frame-pointer \
	-fsanitize=address,undefined -fno-sanitize-recover=undefined

$(FUZZ)/obj/%.o: %.c Makefile
	@mkdir -p $(dir $@)
	$(FUZZ_CC) $(FUZZ_CFLAGS) $(call inc_for,$<) -MMD -MP -fsanitize=fuzzer-no-link -c $< -o $@

$(FUZZ)/libstopcock.a: $(patsubst %.c,$(FUZZ)/obj/%.o,$(LIB_SRC))
	@rm -f $@
	ar rcs $@ $^

$(FUZZ)/bin/fuzz_%: $(FUZZ)/obj/tests/fuzz/fuzz_%.o $(FUZZ)/libstopcock.a
	@mkdir -p $(dir $@)
	$(FUZZ_CC) $(FUZZ_CFLAGS) -fsanitize=fuzzer $^ -o $@ $(LDLIBS)

.PRECIOUS: $(FUZZ)/obj/tests/fuzz/%.o

fuzz: $(addprefix $(FUZZ)/bin/fuzz_,$(FUZZ_TARGETS))
	@bash tests/fuzz/run.sh $(abspath $(FUZZ)) $(FUZZ_SECONDS) $(FUZZ_TARGETS)

# Long versions of the reliability suites: 1,000 SIGKILLs, 60 s of load.
soak: all san
	STOPCOCK_BUILD=$(abspath $(BUILD)) STOPCOCK_KILLS=1000 STOPCOCK_LOAD_S=60 \
	  $(PYTHON) -m pytest -q -p no:cacheprovider -s tests/reliability/test_crash.py tests/reliability/test_load.py

# ---- install ----
install: all
	install -d $(DESTDIR)$(BINDIR) $(DESTDIR)$(SBINDIR) $(DESTDIR)$(DATADIR)/methods \
	  $(DESTDIR)$(DATADIR)/pumps $(DESTDIR)$(DATADIR)/changers $(DESTDIR)$(DATADIR)/scenarios \
	  $(DESTDIR)$(SYSCONFDIR)/stopcock/methods
	install -m 0755 $(BUILD)/bin/stopcockd $(DESTDIR)$(SBINDIR)/stopcockd
	install -m 0755 $(BUILD)/bin/stopcock $(BUILD)/bin/stopcock-sim $(DESTDIR)$(BINDIR)/
	install -m 0644 config/methods/*.yaml $(DESTDIR)$(DATADIR)/methods/
	install -m 0644 config/pumps/*.yaml $(DESTDIR)$(DATADIR)/pumps/
	install -m 0644 config/changers/*.yaml $(DESTDIR)$(DATADIR)/changers/
	install -m 0644 config/scenarios/*.yaml $(DESTDIR)$(DATADIR)/scenarios/
	install -d $(DESTDIR)$(DATADIR)/www && install -m 0644 daemon/server/www/* $(DESTDIR)$(DATADIR)/www/
	@if [ -f config/stopcockd.yaml ]; then install -m 0644 config/stopcockd.yaml \
	  $(DESTDIR)$(SYSCONFDIR)/stopcock/stopcockd.yaml.example; fi
	@if [ -d systemd ] && ls systemd/*.service >/dev/null 2>&1; then \
	  install -d $(DESTDIR)$(UNITDIR) $(DESTDIR)$(PREFIX)/lib/sysusers.d $(DESTDIR)$(PREFIX)/lib/tmpfiles.d; \
	  install -m 0644 systemd/*.service $(DESTDIR)$(UNITDIR)/; \
	  for f in systemd/*sysusers*.conf; do [ -f $$f ] && install -m 0644 $$f $(DESTDIR)$(PREFIX)/lib/sysusers.d/stopcock.conf; done; \
	  for f in systemd/*tmpfiles*.conf; do [ -f $$f ] && install -m 0644 $$f $(DESTDIR)$(PREFIX)/lib/tmpfiles.d/stopcock.conf; done; true; fi
	@for f in docs/*.[1-8]; do [ -f "$$f" ] || continue; s=$${f##*.}; \
	  install -d $(DESTDIR)$(MANDIR)/man$$s; install -m 0644 $$f $(DESTDIR)$(MANDIR)/man$$s/; done
	install -d $(DESTDIR)$(DOCDIR)
	install -m 0644 README.md SAFETY.md docs/*.md docs/openapi.yaml $(DESTDIR)$(DOCDIR)/

uninstall:
	rm -f $(DESTDIR)$(SBINDIR)/stopcockd $(DESTDIR)$(BINDIR)/stopcock $(DESTDIR)$(BINDIR)/stopcock-sim
	rm -rf $(DESTDIR)$(DATADIR) $(DESTDIR)$(DOCDIR)
	rm -f $(DESTDIR)$(UNITDIR)/stopcockd.service $(DESTDIR)$(PREFIX)/lib/sysusers.d/stopcock.conf \
	  $(DESTDIR)$(PREFIX)/lib/tmpfiles.d/stopcock.conf
	@for f in docs/*.[1-8]; do [ -f "$$f" ] || continue; s=$${f##*.}; \
	  rm -f $(DESTDIR)$(MANDIR)/man$$s/$$(basename $$f); done

# ---- code hygiene: all three run inside `make check` ----
C_FILES = $(sort $(foreach l,$(LAYERS),$(wildcard daemon/$(l)/*.[ch])) $(wildcard drivers/*.[ch]) \
	$(wildcard tests/unit/*.[ch] tests/speed/*.[ch] tests/fuzz/*.c))

format:
	clang-format -i $(C_FILES)

# Fails on any file clang-format would change (.clang-format is the style).
format-check:
	@bad=0; for f in $(C_FILES); do clang-format "$$f" | cmp -s - "$$f" || \
	  { echo "format: $$f differs from .clang-format (run make format)"; bad=1; }; done; \
	[ $$bad = 0 ] && echo "format: $(words $(C_FILES)) files match .clang-format"

# tests/lint/jansson.cfg tells cppcheck jansson's foreach macros, so no file is
# skipped at an unknown macro.
lint:
	cppcheck --quiet --error-exitcode=1 --enable=warning,performance,portability \
	  --inline-suppr --std=c11 --library=tests/lint/jansson.cfg $(INC_tests) \
	  $(foreach l,$(LAYERS),daemon/$(l)) drivers tests/unit tests/speed tests/fuzz
	@echo "lint: cppcheck clean on $(words $(C_FILES)) files"

layers:
	@$(PYTHON) tests/lint/layers.py

clean:
	rm -rf $(BUILD)
