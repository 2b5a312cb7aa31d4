"""A compact text plot of one test for the terminal: data, model and input as rows of
Unicode block characters (one character per time bin, height eight levels)."""

from __future__ import annotations

import numpy as np

BLOCKS = "▁▂▃▄▅▆▇█"
WIDTH = 60


def _binned(t: np.ndarray, values: np.ndarray, width: int) -> np.ndarray:
    """Mean of ``values`` in ``width`` equal time bins (NaN where a bin is empty)."""
    edges = np.linspace(t[0], t[-1], width + 1)
    index = np.clip(np.searchsorted(edges, t, side="right") - 1, 0, width - 1)
    sums = np.bincount(index, weights=values, minlength=width)
    counts = np.bincount(index, minlength=width)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(counts > 0, sums / np.maximum(counts, 1), np.nan)


def blocks(values: np.ndarray, low: float, high: float) -> str:
    """``values`` as block characters between ``low`` (▁) and ``high`` (█); NaN as a space."""
    span = high - low
    out = []
    for value in values:
        if not np.isfinite(value):
            out.append(" ")
            continue
        share = 0.5 if span <= 0 else (value - low) / span
        out.append(BLOCKS[int(np.clip(round(share * (len(BLOCKS) - 1)), 0, len(BLOCKS) - 1))])
    return "".join(out)


def sparkline_rows(t, y, fitted, u, *, output_unit: str = "", input_unit: str = "",
                   width: int = WIDTH) -> list[str]:
    """Three labelled rows: output data, fitted model (same scale as the data) and input.

    Parameters
    ----------
    t, y, u : array_like
        Time (s), output and input samples.
    fitted : array_like or None
        The model's output at ``t``; the model row is left out without it.
    """
    t, y, u = (np.asarray(a, float) for a in (t, y, u))
    if len(t) < 2 or not np.isfinite(t[-1] - t[0]) or t[-1] <= t[0]:
        return ["(too few samples to plot)"]
    width = max(8, min(width, len(t)))
    data = _binned(t, y, width)
    model = _binned(t, np.asarray(fitted, float), width) if fitted is not None else None
    both = np.concatenate([data, model]) if model is not None else data
    low, high = float(np.nanmin(both)), float(np.nanmax(both))
    u_binned = _binned(t, u, width)
    u_low, u_high = float(np.nanmin(u_binned)), float(np.nanmax(u_binned))
    out_unit = f" {output_unit}" if output_unit else ""
    in_unit = f" {input_unit}" if input_unit else ""
    rows = [f"  output  {blocks(data, low, high)}  {low:.4g} to {high:.4g}{out_unit}"]
    if model is not None:
        rows.append(f"  model   {blocks(model, low, high)}  (same scale)")
    rows.append(f"  input   {blocks(u_binned, u_low, u_high)}  {u_low:.4g} to {u_high:.4g}{in_unit}")
    rows.append(f"          0 s{' ' * (width - 3 - len(f'{t[-1] - t[0]:.4g} s'))}{t[-1] - t[0]:.4g} s")
    return rows
