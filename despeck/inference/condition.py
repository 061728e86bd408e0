"""What a model is told about a scene: its looks (clamped to the model's range) and speckle correlation, and warnings."""

from __future__ import annotations

__all__ = ["condition_for_model", "model_mismatch_notes"]


def _model_range(model):
    rng = getattr(model, "looks_range", None)
    return tuple(rng) if rng is not None else None


def condition_for_model(model, info, corr, name="scene"):
    """``(looks, correlation, notes)`` to pass to ``model`` for a scene of ``info`` looks and ``corr`` correlation.

    Looks outside the model's trained range are clamped to it (a conditioned network
    does not extrapolate) and the note says so. The correlation is passed when it is
    reliable (:attr:`despeck.looks.SpeckleCorrelation.reliable`); otherwise a model that
    can run blind (``correlation_unknown``) is not told it.
    Models that are not looks-aware get the looks (for the point-target test), and the
    correlation only when they carry a bias table (to look their bias up).
    """
    notes = []
    rng = _model_range(model)
    L = float(info.value)
    if rng is not None and not (rng[0] * 0.9 <= L <= rng[1] * 1.1):
        clamped = min(max(L, rng[0]), rng[1])
        what = "residual speckle" if L < rng[0] else "some oversmoothing"
        trained = f"{rng[0]:g}" if rng[0] == rng[1] else f"{rng[0]:g}-{rng[1]:g}"
        notes.append(f"{name}: {info.describe()}, outside the {trained} looks the model was trained "
                     f"for; applied it as for {clamped:g} looks, expect {what} (train or fine-tune for these looks)")
        L = clamped
    if not getattr(model, "conditioned", False):
        # a bias table (self-supervised models) is still looked up at the scene's correlation
        # as measured: texture reads as some correlation, which is nearer than none
        table = getattr(model, "log_bias_table", None) is not None
        return L, (corr.lag1 if table else None), notes
    if not corr.reliable:
        if getattr(model, "correlation_unknown", False):
            return L, None, notes  # the model runs without being told the correlation
        notes.append(f"{name}: the measured speckle correlation looks like texture ({corr.describe()}); "
                     "this model needs it, so it was used as measured")
    return L, corr.lag1, notes


def model_mismatch_notes(model, reader) -> list[str]:
    """Warnings (one line each) when ``model`` was made for other units or looks than the scene.

    The scene's looks are taken from a ``looks`` (or ``enl``) metadata tag when present;
    otherwise the notes say that the model's looks were assumed.
    """
    notes = []
    meta = getattr(model, "metadata", {}) or {}
    name = reader.path
    m_units = meta.get("units")
    if m_units and reader.units != m_units:
        notes.append(
            f"{name}: the model was trained on {m_units} data but the file holds {reader.units}; "
            f"the values were converted to linear intensity, which the model takes, so results should be comparable"
        )
    # Looks and speckle correlation: see despeck.looks and condition_for_model.
    return notes
