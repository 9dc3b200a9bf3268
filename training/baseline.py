"""The comparison baseline: the class whose shape family fits the dip best.

No learning: a segment takes the class of its lowest-BIC shape family
(:attr:`features.fits.EventFits.best_family`, the ``best_family`` column of a feature table),
through :data:`FAMILY_TO_CLASS`. A segment without fits (no significant dip, or too few points
in it) falls back on the out-of-event power spectrum: ``variability`` when the strongest peak
holds at least :data:`PSD_FRACTION_THRESHOLD` of the power (a coherent star), else
``systematic``. The baseline's labels go to :func:`training.report.evaluate` as ``y_pred``, so
the report can show it beside the gradient-boosted model.
"""

from __future__ import annotations

from types import MappingProxyType

import numpy as np
import pandas as pd

from features.errors import ParameterError

__all__ = ["FAMILY_TO_CLASS", "PSD_FRACTION_THRESHOLD", "predict_baseline"]

FAMILY_TO_CLASS = MappingProxyType({
    "transit": "planet",
    "eclipse": "eclipsing_binary",
    "comet": "exocomet",
    "variability": "variability",
    "artefact": "systematic",
})
"""Shape family -> class."""

PSD_FRACTION_THRESHOLD = 0.3
"""Share of the out-of-event power in its strongest peak above which a dip-less segment is
``variability`` (else ``systematic``).

Measured on 1,500 simulated segments (``simulated_table(1500, seed=101)``): among the 415
variability and systematic segments without fits, the median ``psd_peak_fraction`` is 0.50 for
variability and 0.16 for systematics, and at 0.3 both recalls are 0.73 (the threshold where
they are equal).
"""


def predict_baseline(table: pd.DataFrame) -> np.ndarray:
    """Baseline labels of every row of a feature table.

    Parameters
    ----------
    table : pandas.DataFrame
        With columns ``best_family`` (a key of :data:`FAMILY_TO_CLASS`, or ``""``/missing
        when no dip was fitted) and ``psd_peak_fraction`` (see
        :data:`features.catalog.FEATURES`).

    Returns
    -------
    numpy.ndarray of str, shape (n_rows,)
        One of the five built-in classes per row.

    Raises
    ------
    ParameterError
        ``invalid_parameter`` when a column is absent or ``best_family`` holds an unknown
        family.

    Examples
    --------
    >>> import pandas as pd
    >>> table = pd.DataFrame({"best_family": ["comet", "", ""],
    ...                       "psd_peak_fraction": [0.0, 0.8, 0.1]})
    >>> predict_baseline(table).tolist()
    ['exocomet', 'variability', 'systematic']
    """
    absent = [c for c in ("best_family", "psd_peak_fraction") if c not in table.columns]
    if absent:
        raise ParameterError("invalid_parameter", f"the table lacks the columns {absent}")
    family = table["best_family"].fillna("").astype(str).to_numpy()
    unknown = sorted(set(family) - set(FAMILY_TO_CLASS) - {""})
    if unknown:
        raise ParameterError("invalid_parameter",
                             f"unknown shape families {unknown}; known: {list(FAMILY_TO_CLASS)}")
    # NaN (no power spectrum on a short segment) compares False: systematic
    coherent = table["psd_peak_fraction"].to_numpy(dtype=np.float64) >= PSD_FRACTION_THRESHOLD
    fallback = np.where(coherent, "variability", "systematic")
    mapped = np.array([FAMILY_TO_CLASS.get(f, "") for f in family], dtype=object)
    return np.where(family == "", fallback, mapped).astype(str)
