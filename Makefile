# befit: set-up, service, tests and benchmarks. Everything a fresh machine needs is installed here.
SHELL := /bin/bash
PYTHON ?= python3
ORT_VERSION := 1.31.1
CACHE := .cache
ORT_DIR := $(CACHE)/onnxruntime
ORT_LIB := $(ORT_DIR)/libonnxruntime.so.$(ORT_VERSION)
VENV := $(CACHE)/venv
VENV_PY := $(VENV)/bin/python
BIN := target/release/befit
ADDR ?= 127.0.0.1:7878
DATA_DIR ?= befit-data

export ORT_DYLIB_PATH ?= $(abspath $(ORT_LIB))

.PHONY: all serve test bench ort venv build lint cxx clean api-fuzz fuzz rl decoder-runs figures screenshots base-bundles soak install image image-tools image-test cluster-test cluster-tools cluster-throughput browser browser-deps

all: build

# ONNX Runtime's shared library, taken from the PyPI wheel (no other download is allowed or needed).
$(ORT_LIB):
	@mkdir -p $(ORT_DIR)/wheel
	$(PYTHON) -m pip download --quiet --no-deps --only-binary=:all: \
		-d $(ORT_DIR)/wheel onnxruntime==$(ORT_VERSION)
	cd $(ORT_DIR) && unzip -o -j -q wheel/onnxruntime-$(ORT_VERSION)-*.whl \
		'onnxruntime/capi/libonnxruntime.so*' -d .
	@test -f $(ORT_LIB) || { echo "libonnxruntime.so.$(ORT_VERSION) not found in the wheel" >&2; exit 1; }

ort: $(ORT_LIB)

# Python environment for reference checks and the client's tests (never needed by the service).
$(VENV)/.ready: tests/reference/requirements.txt tests/client/requirements.txt
	$(PYTHON) -m venv $(VENV)
	$(VENV_PY) -m pip install --quiet --upgrade pip
	$(VENV_PY) -m pip install --quiet -r tests/reference/requirements.txt -r tests/client/requirements.txt
	touch $@

venv: $(VENV)/.ready

build: $(ORT_LIB) cxx
	cargo build --release --locked

# usearch's crate compiles C++17 sources: Debian's g++ when no C++ compiler is there.
cxx:
	@command -v c++ > /dev/null || { apt-get update -q && DEBIAN_FRONTEND=noninteractive apt-get install -y -q g++; }

# `make install` (PREFIX=~/.local by default): the binary to PREFIX/bin, ONNX Runtime to
# PREFIX/lib/befit/, where the binary looks for it (src/runtime/mod.rs).
PREFIX ?= $(HOME)/.local
install: build
	install -D -m 755 $(BIN) $(PREFIX)/bin/befit
	install -D -m 644 $(ORT_LIB) $(PREFIX)/lib/befit/libonnxruntime.so.$(ORT_VERSION)
	@echo "installed $(PREFIX)/bin/befit (and $(PREFIX)/lib/befit/libonnxruntime.so.$(ORT_VERSION))"

serve: build
	@mkdir -p $(DATA_DIR)
	$(BIN) serve --bundle fixtures/models/blocks-v1 --listen $(ADDR) --data-dir $(DATA_DIR) \
		--image-root fixtures/probe

lint: cxx
	cargo fmt --check
	cargo clippy --locked --all-targets -- -D warnings

# The statistics cross-check reads exports from target/stats-export/: synthetic ones written by
# `cargo test`, and these two, made by the real CLI on the bundled probe set.
STATS_EXPORT := target/stats-export
PROBE := fixtures/probe/probe.jsonl

test: $(ORT_LIB) $(VENV)/.ready lint
	cargo test --locked
	target/debug/befit calibrate --bundle fixtures/models/blocks-v1 --probe $(PROBE) \
		--export $(STATS_EXPORT)/calibration-blocks-v1.json --report $(STATS_EXPORT)/calibration-blocks-v1.html > /dev/null
	target/debug/befit drift --from fixtures/models/blocks-v1 --to fixtures/models/blocks-v2 --probe $(PROBE) \
		--export $(STATS_EXPORT)/drift-blocks-v1-v2.json --report $(STATS_EXPORT)/drift-blocks-v1-v2.html > /dev/null
	cargo build --release --locked
	$(VENV_PY) -m pytest -q tests/reference tests/client tests/docs tests/tools
	$(MAKE) --no-print-directory api-fuzz
	$(MAKE) --no-print-directory browser
	$(MAKE) --no-print-directory cluster-test
	$(MAKE) --no-print-directory image-test

# Schema-driven fuzzing of every documented route against the release binary (schemathesis from
# PyPI, in its own venv): no 5xx, every answer valid against docs/openapi.json. API_FUZZ_SECONDS
# bounds the run.
API_VENV := $(CACHE)/venv-api
API_FUZZ_SECONDS ?= 90
$(API_VENV)/.ready: tests/api/requirements.txt
	$(PYTHON) -m venv $(API_VENV)
	$(API_VENV)/bin/python -m pip install --quiet --upgrade pip
	$(API_VENV)/bin/python -m pip install --quiet -r tests/api/requirements.txt
	touch $@

api-fuzz: build $(API_VENV)/.ready
	$(API_VENV)/bin/python tests/api/schema_fuzz.py --max-time $(API_FUZZ_SECONDS)

# The live page in headless Chromium from Debian's archive, driven by playwright-core from npm;
# screenshots land in target/browser/.
BROWSER_DIR := tests/browser
browser-deps:
	command -v chromium >/dev/null || (apt-get update && DEBIAN_FRONTEND=noninteractive apt-get install -y chromium chromium-driver)
	cd $(BROWSER_DIR) && npm ci --no-audit --no-fund

browser: build browser-deps
	cd $(BROWSER_DIR) && BEFIT_BIN=$(abspath $(BIN)) node --test live.test.mjs

# Screenshots in docs/ (README, docs/statistics.md): the live page as the browser test leaves it,
# and both reports made by the real CLI on the bundled blocks models and probe set.
screenshots: browser
	target/release/befit calibrate --bundle fixtures/models/blocks-v1 --probe $(PROBE) \
		--report $(STATS_EXPORT)/calibration-blocks-v1.html > /dev/null
	target/release/befit drift --from fixtures/models/blocks-v1 --to fixtures/models/blocks-v2 --probe $(PROBE) \
		--report $(STATS_EXPORT)/drift-blocks-v1-v2.html > /dev/null
	cd $(BROWSER_DIR) && node report-shots.mjs $(abspath $(STATS_EXPORT))/calibration-blocks-v1.html \
		$(abspath $(STATS_EXPORT))/drift-blocks-v1-v2.html $(abspath docs)
	cp target/browser/live-1280.png docs/live-page.png

# The policy-gradient example against a running `make serve`.
# The examples' own small environment (numpy, matplotlib): no reference libraries needed.
EXAMPLES_VENV := $(CACHE)/venv-examples
$(EXAMPLES_VENV)/.ready: examples/requirements.txt
	$(PYTHON) -m venv $(EXAMPLES_VENV)
	$(EXAMPLES_VENV)/bin/python -m pip install --quiet -r examples/requirements.txt
	touch $@

rl: $(EXAMPLES_VENV)/.ready
	$(EXAMPLES_VENV)/bin/python examples/blocks_rl.py --url http://$(ADDR)

# The two GRU-captioner runs of the README (PyTorch; its own venv) against a running `make serve`.
TORCH_VENV := $(CACHE)/venv-torch
$(TORCH_VENV)/.ready: examples/requirements-torch.txt
	$(PYTHON) -m venv $(TORCH_VENV)
	$(TORCH_VENV)/bin/python -m pip install --quiet -r examples/requirements-torch.txt
	touch $@

decoder-runs: $(TORCH_VENV)/.ready
	$(TORCH_VENV)/bin/python examples/blocks_decoder.py --url http://$(ADDR) --run cosine-only --steps 200 --lr 3e-3 \
		--pretrain-epochs 6 --thresholds '{"distinct_2_below": 0.05}' --log docs/blocks_decoder/cosine-only.json
	$(TORCH_VENV)/bin/python examples/blocks_decoder.py --url http://$(ADDR) --run repetition-guard --steps 200 --lr 3e-3 \
		--pretrain-epochs 6 --thresholds '{"distinct_2_below": 0.05}' --log docs/blocks_decoder/repetition-guard.json \
		--penalties '{"repeated_words": {"above": 0.3, "weight": 1.0}, "repeated_bigrams": {"above": 0.2, "weight": 1.0}}'
	$(TORCH_VENV)/bin/python examples/blocks_decoder.py --url http://$(ADDR) --run fluency-guard --steps 200 --lr 3e-3 \
		--pretrain-epochs 6 --thresholds '{"distinct_2_below": 0.05}' --log docs/blocks_decoder/fluency-guard.json \
		--fluency-weight 1
	$(TORCH_VENV)/bin/python examples/plot_decoder_runs.py docs/blocks_decoder/*.json --out docs/blocks_decoder.png

# Figures quoted in README.md and docs/ (tools/docfigures.py): `make figures` measures the
# recorded runs again on the bundled models and rewrites every figure; `make test` checks them.
figures: build $(EXAMPLES_VENV)/.ready
	$(EXAMPLES_VENV)/bin/python tools/docfigures.py measure

# Base-size bundles (ViT-B/32 shape, seeded random weights; fp32 and int8) for benchmarks, made
# with the tools' own pinned environment (PyTorch, CPU). About 10 minutes on 2 cores; never CI.
TOOLS_VENV := $(CACHE)/venv-tools
$(TOOLS_VENV)/.ready: tools/requirements.txt
	$(PYTHON) -m venv $(TOOLS_VENV)
	$(TOOLS_VENV)/bin/python -m pip install --quiet --upgrade pip
	$(TOOLS_VENV)/bin/python -m pip install --quiet -r tools/requirements.txt
	touch $@

base-bundles: $(TOOLS_VENV)/.ready
	$(TOOLS_VENV)/bin/python tools/base_bundles.py --out $(CACHE)/bundles

$(CACHE)/.bench-ready: $(VENV)/.ready bench/requirements.txt
	$(VENV_PY) -m pip install --quiet -r bench/requirements.txt
	touch $@

# Benchmarks print befit beside its reference from one run; BENCH_ARGS go to the retrieval part
# (default: the 100k size only, every index backend beside hnswlib).
# BENCH_1M=1 adds the full sizes, each backend that finishes in reasonable time beside hnswlib:
# the 1M x 64 blocks bank and the 200k x 512 one with usearch (hnsw_rs would build 1M for about
# two hours; BENCHMARKS.md, "Retrieval", has the measured times).
BENCH_ARGS ?= --sizes 100000
BENCH_1M ?=
bench: build $(CACHE)/.bench-ready
	$(VENV_PY) bench/run.py $(BENCH_ARGS)
	$(if $(BENCH_1M),BENCH_PARTS=retrieval $(VENV_PY) bench/run.py --sizes 1000000 --kinds blocks --backends usearch --ef-search 32,64,128,256,512,1024 --query-threads 2)
	$(if $(BENCH_1M),BENCH_PARTS=retrieval $(VENV_PY) bench/run.py --sizes 200000 --kinds blocks --dim 512 --backends usearch --ef-search 256,1024,2048,4096 --query-threads 2 --out target/retrieval512)

# --- Past one machine: the image, the manifests, the scale-out test ---
# (README, "Running it for a cluster").
IMAGE ?= localhost/befit:$(shell sed -n 's/^version = "\(.*\)"/\1/p' Cargo.toml | head -1)
CLUSTER_READY := $(CACHE)/.cluster-ready

# With no docker daemon, the image is built by buildah (chroot isolation) on a
# base made by debootstrap; both come from Debian's archive.
image-tools:
	@if ! (command -v docker > /dev/null && docker info > /dev/null 2>&1); then \
		missing=; for t in buildah podman debootstrap; do command -v $$t > /dev/null || missing="$$missing $$t"; done; \
		if [ -n "$$missing" ]; then apt-get update -q && DEBIAN_FRONTEND=noninteractive apt-get install -y -q $$missing; fi; \
	fi

# The image, from the release binary built here (docker/Dockerfile).
image: $(ORT_LIB) image-tools
	cargo build --release --locked
	IMAGE=$(IMAGE) ORT_VERSION=$(ORT_VERSION) docker/build-image.sh

# Manifest validation (kubernetes-validate) and the reverse proxy of the scale-out test.
$(CLUSTER_READY): $(VENV)/.ready tests/cluster/requirements.txt
	$(VENV_PY) -m pip install --quiet -r tests/cluster/requirements.txt
	touch $@

cluster-tools: $(CLUSTER_READY)
	@command -v nginx > /dev/null || { apt-get update -q && DEBIAN_FRONTEND=noninteractive apt-get install -y -q nginx; }

# Manifests validated; three reward replicas, a bank replica and the proxy on loopback.
cluster-test: build cluster-tools
	$(VENV_PY) -m pytest -q tests/cluster/test_manifests.py tests/cluster/test_scale_out.py

# Builds the image and runs the service from its filesystem (buildah run, chroot).
# About 2 minutes on a fresh machine (debootstrap makes the base), seconds after.
image-test: image cluster-tools
	BEFIT_IMAGE=$(IMAGE) $(VENV_PY) -m pytest -q tests/cluster/test_image.py

# befit under abuse and faults on loopback (tests/soak/soak.py): 3x load, slow and idle clients,
# image bombs, kill -9 during writes, damaged files; prints its figures. About 1 minute. befit runs
# alone on the first core and the load generator on the others (SOAK_ARGS=--shared-cores: together).
SOAK_ARGS ?=
soak: build $(VENV)/.ready
	$(VENV_PY) tests/soak/soak.py --json target/soak.json $(SOAK_ARGS)

# Coverage-guided fuzzing (cargo-fuzz and libFuzzer, fuzz/): each target for FUZZ_SECONDS on one
# core. cargo-fuzz asks for nightly-only flags; RUSTC_BOOTSTRAP=1 lets the machine's stable
# toolchain take them. Findings land in fuzz/artifacts/TARGET/; the figures in BENCHMARKS.md
# ("Fuzzing") come from this target's summary lines. Leak detection is off for bank_dump only: the
# dump loader leaks its few-hundred-byte hnsw_rs loader per load by design (src/bank/index/hnsw.rs).
FUZZ_SECONDS ?= 300
FUZZ_TARGETS := image_bytes request_bodies bundle_toml probe_jsonl map_json bank_dump
fuzz:
	command -v cargo-fuzz >/dev/null || cargo install --locked cargo-fuzz@0.13.2
	$(PYTHON) fuzz/seed_corpora.py
	cd fuzz && RUSTC_BOOTSTRAP=1 cargo fuzz build -O
	@mkdir -p target/fuzz
	@for t in $(FUZZ_TARGETS); do \
		leaks=1; [ $$t = bank_dump ] && leaks=0; \
		( cd fuzz && ASAN_OPTIONS=detect_leaks=$$leaks RUSTC_BOOTSTRAP=1 cargo fuzz run -O $$t corpus/$$t -- \
			-max_total_time=$(FUZZ_SECONDS) -rss_limit_mb=2048 -timeout=10 -print_final_stats=1 \
			-detect_leaks=$$leaks 2> ../target/fuzz/$$t.log ) || { tail -40 target/fuzz/$$t.log; exit 1; }; \
		echo "$$t: $$(grep -m1 number_of_executed_units target/fuzz/$$t.log | tr -s ' ' | cut -d' ' -f2) runs," \
			"$$(grep -E '^#[0-9]+[[:space:]].*cov:' target/fuzz/$$t.log | tail -1 | sed -E 's/.*cov: ([0-9]+).*/\1/') edges"; \
	done

# Rewards per second through one replica and through three (a measurement, not a test).
cluster-throughput: build cluster-tools
	$(VENV_PY) tests/cluster/throughput.py

clean:
	cargo clean
	rm -rf $(CACHE)
