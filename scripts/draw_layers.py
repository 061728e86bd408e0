"""The layers of the package and the imports between its units, read from the code.

The layer of each unit (a top-level module or package of ``despeck``) is read from the
table "Layout and layers" in DEVELOPERS.md; the imports are read from the source with
:mod:`ast` (``import despeck.x``, ``from ..x import y``, also inside functions). Draws
``docs/layers.png``: one row per layer, lowest at the bottom, one box per unit, an arrow
for each unit that imports another. ``tests/test_layers.py`` checks with the same two
readings that no unit imports from a higher layer.

Usage::

    python scripts/draw_layers.py [--out docs/layers.png]
"""

from __future__ import annotations

import argparse
import ast
import pathlib
import re

ROOT = pathlib.Path(__file__).resolve().parents[1]
PACKAGE = ROOT / "despeck"
ROW = re.compile(r"^\| (\d+) \| `despeck/([a-z_]+)(?:\.py|/)` \|")


def layer_table(developers=ROOT / "DEVELOPERS.md") -> dict:
    """``{unit: layer}`` from DEVELOPERS.md's layer table (``despeck/x.py`` or ``despeck/x/`` rows)."""
    table = {}
    for line in pathlib.Path(developers).read_text(encoding="utf-8").splitlines():
        m = ROW.match(line)
        if m:
            table[m.group(2)] = int(m.group(1))
    return table


def unit_of(path: pathlib.Path) -> str | None:
    rel = path.relative_to(PACKAGE)
    if len(rel.parts) == 1:
        return None if rel.stem in ("__init__", "__main__") else rel.stem
    return rel.parts[0]


def imported_units(path: pathlib.Path, package: pathlib.Path = PACKAGE) -> set:
    """Units of despeck that the module at ``path`` (inside ``package``) imports (absolute or relative imports)."""
    tree = ast.parse(path.read_text(encoding="utf-8"))
    rel = path.relative_to(package)
    here = list(rel.parts[:-1])  # package of the module, inside despeck
    found = set()
    for node in ast.walk(tree):
        if isinstance(node, ast.Import):
            for alias in node.names:
                parts = alias.name.split(".")
                if parts[0] == "despeck" and len(parts) > 1:
                    found.add(parts[1])
        elif isinstance(node, ast.ImportFrom):
            if node.level == 0:
                parts = (node.module or "").split(".")
                if parts[0] != "despeck":
                    continue
                target = parts[1:]
            else:
                base = here[: len(here) - (node.level - 1)] if node.level > 1 else here
                if node.level - 1 > len(here):
                    continue
                target = base + ((node.module or "").split(".") if node.module else [])
            if target:
                found.add(target[0])
            else:  # "from .. import x" at the package root: x may be a unit or a name
                found.update(a.name for a in node.names
                             if (package / f"{a.name}.py").is_file() or (package / a.name).is_dir())
    return found


def import_graph() -> dict:
    """``{unit: set of units it imports}`` over every module of the package."""
    graph = {}
    for path in sorted(PACKAGE.rglob("*.py")):
        unit = unit_of(path)
        if unit is None:
            continue
        graph.setdefault(unit, set()).update(u for u in imported_units(path) if u != unit)
    return graph


def draw(out: pathlib.Path) -> None:
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    table, graph = layer_table(), import_graph()
    rows = {}
    for unit, layer in sorted(table.items(), key=lambda kv: (kv[1], kv[0])):
        rows.setdefault(layer, []).append(unit)
    pos = {}
    for layer, units in rows.items():
        for i, unit in enumerate(units):
            pos[unit] = ((i + 0.5) / len(units), layer)
    fig, ax = plt.subplots(figsize=(12, 7))
    for unit, targets in graph.items():
        for t in targets:
            if unit in pos and t in pos:
                (x0, y0), (x1, y1) = pos[unit], pos[t]
                ax.annotate("", xy=(x1, y1 + 0.12), xytext=(x0, y0 - 0.12),
                            arrowprops=dict(arrowstyle="->", color="0.6", lw=0.7, shrinkA=2, shrinkB=2))
    for unit, (x, y) in pos.items():
        name = unit + ("/" if (PACKAGE / unit).is_dir() else ".py")
        ax.text(x, y, name, ha="center", va="center", fontsize=9,
                bbox=dict(boxstyle="round,pad=0.3", fc=plt.cm.Pastel1(table[unit] % 9), ec="0.3"))
    for layer in rows:
        ax.text(-0.06, layer, f"layer {layer}", ha="right", va="center", fontsize=10, weight="bold")
    ax.set_xlim(-0.2, 1.02)
    ax.set_ylim(-0.6, max(rows) + 0.6)
    ax.axis("off")
    ax.set_title("despeck: units by layer (lowest at the bottom); arrows point from importer to imported")
    fig.tight_layout()
    out.parent.mkdir(parents=True, exist_ok=True)
    fig.savefig(out, dpi=110)
    plt.close(fig)


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", default=str(ROOT / "docs" / "layers.png"))
    args = p.parse_args(argv)
    draw(pathlib.Path(args.out))
    print(f"wrote {args.out}")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
