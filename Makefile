# `make demo` and `make test` set everything up from scratch in .venv and then do their job.
PYTHON ?= python3
VENV := .venv
BIN := $(VENV)/bin
STAMP := $(VENV)/.installed
# numba's compiled kernels, cached once after installing and whenever a kernel source changes
COMPILED := $(VENV)/.compiled

.PHONY: demo test lint docs bench fuzz clean

$(STAMP): pyproject.toml
	$(PYTHON) -m venv $(VENV)
	$(BIN)/python -m pip install --quiet --upgrade pip
	$(BIN)/python -m pip install --quiet -e ".[test]"
	touch $(STAMP)

$(COMPILED): $(STAMP) toolbox/precompile.py $(wildcard toolbox/kernels/*.py toolbox/kernels/*/*.py)
	$(BIN)/python -m toolbox.precompile
	touch $(COMPILED)

demo: $(COMPILED)
	@mkdir -p demo_output
	$(BIN)/pairspread group-spread sample_layers/quenwick.gpkg --layer households \
	    --group-by district --weight residents --output demo_output/spread.gpkg --overwrite
	$(BIN)/pairspread group-spread sample_layers/households_east.shp --group-by district,tenure \
	    --output demo_output/spread_east.csv --overwrite
	@echo "The tables went to demo_output/spread.gpkg (table 'group_spread') and demo_output/spread_east.csv:"
	@$(BIN)/python -c "import pyogrio; t = pyogrio.read_dataframe('demo_output/spread.gpkg', layer='group_spread'); t['note'] = t['note'].fillna(''); print(t.to_string(index=False, na_rep=''))"
	$(BIN)/pairspread group-spread sample_layers/quenwick.gpkg --layer households --weight residents \
	    --regions sample_layers/quenwick.gpkg --regions-layer wards --region-id ward --output-on regions \
	    --output demo_output/wards_spread.gpkg --map demo_output/wards_map.png --overwrite
	@echo "The regional summary went onto the ward polygons in demo_output/wards_spread.gpkg (layer 'group_spread'),"
	@echo "and its map to demo_output/wards_map.png (the picture in README.md, docs/images/demo_map.png)."

test: $(COMPILED) lint
	$(BIN)/python -m pytest -q -n 2 toolbox tests

lint: $(STAMP)
	$(BIN)/ruff check toolbox tests bench
	$(BIN)/python -m toolbox.docgen --check docs/scripts.md

docs: $(STAMP)
	$(BIN)/python -m toolbox.docgen docs/scripts.md
	$(BIN)/python -c "import toolbox.chain as c; c.main(['schema', 'docs/chain.schema.json'])"

bench: $(COMPILED)
	$(BIN)/python bench/bench_suite.py --tests

fuzz: $(COMPILED)
	HYPOTHESIS_PROFILE=long $(BIN)/python -m pytest -q tests/test_properties.py
	PAIRSPREAD_KILL_TRIALS=500 $(BIN)/python -m pytest -q -rP tests/test_safety.py -k sigkill
	PAIRSPREAD_WRITER_TRIALS=100 $(BIN)/python -m pytest -q tests/test_concurrent_writes.py

clean:
	rm -rf $(VENV) demo_output bench/data
