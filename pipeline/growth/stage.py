"""Stage 3 as one function on in-memory tables: :func:`fit_growth` (the ``fit`` command without
files; the command calls it too). ``pipeline.api`` re-exports it."""
from __future__ import annotations

import pandas as pd

from pipeline.config import Config
from pipeline.growth.fit_table import UNFITTED_COLUMNS


def fit_growth(longitudinal: pd.DataFrame, events: pd.DataFrame | None = None, *,
               config: Config = Config()
               ) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """fits.tsv, group_fits.tsv and unfitted.tsv rows; ``events`` has subject, day, event[,
    lesion]. A lesion phase where no law could be fitted (fewer sessions than any law has
    parameters) has no row in fits.tsv (docs/outputs.md §4.7) but one in ``unfitted`` saying why."""
    from pipeline.growth import group_fits as groupfit
    from pipeline.growth import lesion_fits as growth
    from pipeline.growth import phases
    from pipeline.growth.response_fits import add_windows

    table = longitudinal if "group" in longitudinal.columns else \
        longitudinal.assign(group="")
    phased = phases.assign_phases(table, events, settings=config.fitting)
    fits = add_windows(growth.fit_lesions(phased, settings=config.fitting), phased,
                       settings=config.fitting)       # + response laws over whole phases
    none = fits["model"] == "none"
    unfitted = fits.loc[none, [c for c in UNFITTED_COLUMNS if c in fits.columns]]
    return (fits[~none].reset_index(drop=True),
            groupfit.fit_groups(phased, settings=config.fitting),
            unfitted.reset_index(drop=True))
