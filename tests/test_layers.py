"""The package's layers as DEVELOPERS.md states them hold in the code: no unit imports from a higher layer.

The layer table is read from DEVELOPERS.md ("Layout and layers") and the imports from
the source with :mod:`ast` (``scripts/draw_layers.py``, which also draws
``docs/layers.png``). The rule is the project's own design (DEVELOPERS.md); layering
of this kind is common practice.
"""

from __future__ import annotations

import pathlib
import sys

ROOT = pathlib.Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT / "scripts"))

import draw_layers  # noqa: E402


def test_every_unit_has_a_layer_and_every_row_a_unit():
    table, graph = draw_layers.layer_table(), draw_layers.import_graph()
    assert set(graph) == set(table), (sorted(set(graph) - set(table)), sorted(set(table) - set(graph)))


def test_no_unit_imports_from_a_higher_layer():
    table, graph = draw_layers.layer_table(), draw_layers.import_graph()
    upward = [(u, table[u], t, table[t]) for u, ts in graph.items() for t in ts if table[t] > table[u]]
    assert upward == []


def test_the_reader_sees_relative_and_absolute_imports(tmp_path):
    # A check that can fail: a module importing upward is found, whatever the import form.
    pkg = tmp_path / "despeck"
    (pkg / "speckle").mkdir(parents=True)
    path = pkg / "speckle" / "probe.py"
    path.write_text("from ..inference import despeckle_array\nimport despeck.cli\nfrom . import checks\n"
                    "def late():\n    from ..models import load_model_file\n")
    assert draw_layers.imported_units(path, pkg) == {"inference", "cli", "speckle", "models"}
