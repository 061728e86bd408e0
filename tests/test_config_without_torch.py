"""Checking a training config needs no torch: model names come from the registry's own table.

``despeck train --config`` (and any script) reads and checks a config before anything
is trained; that must not cost torch's import. Keeping a package's heavy dependencies
out of light entry points by importing them on first use is common practice (PEP 562,
module ``__getattr__``); a fresh interpreter is the only place where "not imported" can
be observed, so the checks run in subprocesses.
"""

import importlib
import subprocess
import sys
from pathlib import Path

from despeck.models import registry

ROOT = Path(__file__).resolve().parents[1]


def _python(code):
    proc = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=ROOT, timeout=300)
    assert proc.returncode == 0, proc.stderr
    return proc.stdout.split("\n")[0]


def test_load_config_of_the_starter_leaves_torch_unloaded():
    out = _python(
        "import sys\n"
        "from despeck.training import load_config\n"
        "config = load_config('configs/starter.yaml')\n"
        "print(config.model.name, config.speckle.looks, 'torch' in sys.modules, 'lightning' in sys.modules)\n"
    )
    assert out == "unet-cond-m [1.0, 16.0] False False"


def test_unknown_model_name_is_refused_without_torch():
    out = _python(
        "import sys\n"
        "from despeck.errors import ConfigError\n"
        "from despeck.training import config_from_dict\n"
        "try:\n"
        "    config_from_dict({'data': {'synthetic_scenes': 1}, 'model': {'name': 'bignet'}})\n"
        "except ConfigError as exc:\n"
        "    print(str(exc).split(';')[0], '|', 'torch' in sys.modules)\n"
    )
    assert out == "config key model.name: unknown model 'bignet' | False"


def test_the_table_of_built_in_variants_matches_what_the_modules_register():
    # Every name of the table is registered by the module the table gives ...
    for name, module in registry.BUILTIN_MODELS.items():
        assert registry.model_entry(name).constructor.__module__ == f"despeck.models.{module}", name
    # ... and every variant a module of despeck.models registers is in the table, so the
    # names a config is checked against without torch are all there are.
    for module in set(registry.BUILTIN_MODELS.values()):
        importlib.import_module(f"despeck.models.{module}")
    ours = {name for name in registry.list_models()
            if registry.model_entry(name).constructor.__module__.startswith("despeck.models.")}
    assert ours == set(registry.BUILTIN_MODELS)
