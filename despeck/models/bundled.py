"""Model files shipped inside the package (no download ever happens)."""

from __future__ import annotations

from pathlib import Path

from ..errors import InputError

__all__ = ["BUNDLED_MODELS", "bundled_model_path", "resolve_model_path"]

_WEIGHTS = Path(__file__).resolve().parent.parent / "weights"

#: Name -> file inside ``despeck/weights``. ``starter`` is the default of ``despeck apply``;
#: ``starter-fast`` is an earlier, smaller starter (``unet-cond-s``), about 1.3-1.6x faster
#: and 0.2-1.05 dB lower in PSNR (``despeck/weights/starter.md``).
BUNDLED_MODELS = {"starter": "starter.safetensors", "starter-fast": "starter_fast.safetensors"}


def bundled_model_path(name: str = "starter") -> Path:
    """Path of the bundled model ``name`` (``"starter"``: the default of ``despeck apply``)."""
    try:
        return _WEIGHTS / BUNDLED_MODELS[name]
    except KeyError:
        raise InputError(f"no bundled model {name!r}; bundled: {', '.join(BUNDLED_MODELS)}") from None


def resolve_model_path(value) -> Path:
    """A bundled model's name (``starter``) or a path to a model file, as a Path."""
    text = str(value)
    return bundled_model_path(text) if text in BUNDLED_MODELS else Path(text).expanduser()
