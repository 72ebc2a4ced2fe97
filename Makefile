# The whole set-up on a fresh machine: `make demo` and `make test`.
VENV := .venv
BIN := $(VENV)/bin

.PHONY: demo test slow lint bench setup clean

setup:
	@bash tools/bootstrap.sh

demo: setup
	$(BIN)/buttress compare examples/wall-bracket-2d.toml --out demo-results/wall-bracket --overwrite

test: setup
	$(BIN)/python -m pytest -q

slow: setup
	$(BIN)/python -m pytest -q -m slow

lint: setup
	$(BIN)/ruff check topopt filters tests benchmarks examples

bench: setup
	$(BIN)/python benchmarks/iteration.py --dims 2 --out benchmarks/results-2d.json
	$(BIN)/python benchmarks/iteration.py --dims 3 --out benchmarks/results-3d.json
	$(BIN)/python benchmarks/iteration.py --report benchmarks/results-2d.json benchmarks/results-3d.json \
		--notes benchmarks/notes.md --markdown benchmarks/results.md
	$(BIN)/python benchmarks/startup.py --markdown benchmarks/startup.md
	$(BIN)/python benchmarks/printability.py --out benchmarks/printability.md
	$(BIN)/python benchmarks/orientation.py --out benchmarks/orientation.md

clean:
	rm -rf demo-results .pytest_cache
