# The two set-up commands. Each one installs what is missing (Debian packages),
# configures and builds; see README.md.
BUILD_DIR ?= build
JOBS ?= $(shell nproc)

.PHONY: demo test build deps configure clean bench

deps:
	bash tools/scripts/install-deps.sh

configure: deps
	cmake -S . -B $(BUILD_DIR) -G Ninja -DCMAKE_BUILD_TYPE=Release

build: configure
	cmake --build $(BUILD_DIR) -j $(JOBS)

demo: build
	bash examples/demo.sh $(BUILD_DIR)/lobit

test: build
	bash tools/scripts/fetch-test-models.sh
	cd $(BUILD_DIR) && ctest --output-on-failure -j $(JOBS)

bench: build
	$(BUILD_DIR)/tools/bench/lobit_bench --benchmark_min_time=0.5
	$(BUILD_DIR)/tools/bench/lobit_score_bench --benchmark_min_time=0.5
	$(BUILD_DIR)/tools/bench/lobit_checkpoint_bench

clean:
	rm -rf $(BUILD_DIR)
