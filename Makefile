# tinygen - set-up and everyday commands. Everything installs into .venv (created on demand).
PYTHON ?= python3
VENV ?= .venv
PY := $(VENV)/bin/python
TG := $(VENV)/bin/tinygen
DEMO_MODEL := examples/pump_vibration/pump_vibration.onnx
DEMO_OUT := out/pump_vibration

.PHONY: demo test lint bench fuzz toolchain tables clean

$(VENV)/.installed: pyproject.toml setup.py
	$(PYTHON) -m venv $(VENV)
	$(PY) -m pip install -q --upgrade pip
	$(PY) -m pip install -q -e '.[test]'
	touch $@

demo: $(VENV)/.installed
	$(TG) emit $(DEMO_MODEL) -o $(DEMO_OUT) --force
	$(TG) check $(DEMO_MODEL) --samples 100 --against-onnxruntime
	@echo "demo: the C tree is in $(DEMO_OUT)/ (see README, 'In your firmware')"

lint: $(VENV)/.installed
	$(VENV)/bin/ruff check tinygen tests examples

# The Arm and RISC-V cross toolchains (with newlib / picolibc) and QEMU come from Debian's
# packages (target tests need them), and headless Chromium for the report's browser test.
toolchain:
	@if ! command -v arm-none-eabi-gcc >/dev/null || ! command -v qemu-system-arm >/dev/null \
	    || ! command -v riscv64-unknown-elf-gcc >/dev/null \
	    || ! command -v qemu-system-riscv32 >/dev/null \
	    || ! command -v clang >/dev/null || ! command -v chromium >/dev/null; then \
	  if [ "$$(id -u)" = 0 ] && command -v apt-get >/dev/null; then \
	    apt-get update -q && DEBIAN_FRONTEND=noninteractive apt-get install -y -q \
	      gcc-arm-none-eabi libnewlib-arm-none-eabi qemu-system-arm \
	      gcc-riscv64-unknown-elf picolibc-riscv64-unknown-elf qemu-system-misc clang chromium; \
	  else \
	    echo "note: target and browser tests will skip: install gcc-arm-none-eabi libnewlib-arm-none-eabi qemu-system-arm gcc-riscv64-unknown-elf picolibc-riscv64-unknown-elf qemu-system-misc clang chromium"; \
	  fi; \
	fi

# pytest-xdist (in the test extra) spreads the suite over PYTEST_JOBS workers (auto: one
# per core); tests that share a costly module fixture carry an xdist_group mark. Without
# xdist the suite runs in one process.
PYTEST_JOBS ?= auto
test: $(VENV)/.installed toolchain lint
	$(PY) -m pytest $$($(PY) -c "import xdist" 2>/dev/null \
	    && echo "-n $(PYTEST_JOBS) --dist loadgroup")

bench: $(VENV)/.installed
	$(PY) -m tinygen.bench
	@if command -v arm-none-eabi-gcc >/dev/null && command -v qemu-system-arm >/dev/null; \
	then $(PY) -m tinygen.bench_target >/dev/null && echo "wrote bench/target.md"; \
	else echo "bench/target.md not regenerated: needs arm-none-eabi-gcc and qemu-system-arm"; fi

fuzz: $(VENV)/.installed
	$(PY) -m pytest tests/fuzz -p no:cacheprovider --hypothesis-profile=campaign

# Re-measure the README figure tables (host, and target when the toolchain is there).
tables: $(VENV)/.installed
	$(PY) -m tinygen.tables

clean:
	rm -rf out build .pytest_cache
