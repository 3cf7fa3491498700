"""``stimsteer predict``: the file workflow of a pattern prediction.

The numerics (reading the pattern, checking it against the model, predicting with the held-out band) are
:func:`stimsteer.sysid.predict_pattern` and its neighbours; this module turns a
:class:`~stimsteer.sysid.PatternPrediction` into ``prediction.csv`` and ``prediction.png`` in one folder, written
atomically (a failure leaves no folder behind; an existing folder is kept unless ``force``).
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ...sysid._files import atomic_dir
from ..figures.predict import prediction_figure

__all__ = ["prediction_table", "write_prediction"]


def prediction_table(pred) -> pd.DataFrame:
    """Time, inputs, predicted outputs and the held-out RMSE per output, in the session table's column syntax.

    Columns: ``time [s] @ <rate> Hz``, ``in:<name> [<unit>]``, ``out:<name> [<unit>]`` and
    ``rmse:<name> [<unit>]`` (the band's half-width).
    """
    rate = 1.0 / np.median(np.diff(pred.time_s)) if pred.time_s.size > 1 else float("nan")
    cols = {f"time [s] @ {rate:.12g} Hz" if np.isfinite(rate) else "time [s]": pred.time_s}
    for j, (n, unit) in enumerate(zip(pred.input_names, pred.input_units)):
        cols[f"in:{n} [{unit}]"] = pred.u[:, j]
    for j, (n, unit) in enumerate(zip(pred.output_names, pred.output_units)):
        cols[f"out:{n} [{unit}]"] = pred.y[:, j]
    for j, (n, unit) in enumerate(zip(pred.output_names, pred.output_units)):
        cols[f"rmse:{n} [{unit}]"] = pred.band[:, j]
    return pd.DataFrame(cols)


def write_prediction(pred, out_dir, *, force: bool = False) -> dict:
    """Write ``prediction.csv`` (:func:`prediction_table`) and ``prediction.png`` into ``out_dir``, atomically.

    Parameters
    ----------
    pred : PatternPrediction
    out_dir : str or Path
        The folder to create.
    force : bool, default False
        Replace an existing folder.

    Returns
    -------
    dict
        ``{"csv": Path, "png": Path}`` of the final files.
    """
    out = Path(out_dir)
    with atomic_dir(out, force=force) as tmp:
        prediction_table(pred).to_csv(tmp / "prediction.csv", index=False, float_format="%.10g")
        prediction_figure(pred).savefig(tmp / "prediction.png", dpi=110)
    return {"csv": out / "prediction.csv", "png": out / "prediction.png"}
