"""The passes over the ensemble: the reference levels once, candidate steps as the search asks.

The reference pass steps every member at the case's step and at the two finest levels of the
ladder in one streaming call (:func:`errbudget.solve.stream.stream`); the per-member
Richardson reference comes from the two finest levels, and the artefacts of the case's step
from comparing its features with the finest level's. Candidate steps are then stepped only
when the search needs them (:class:`Candidates`), each level once, judged against the
finest level's features kept from the reference pass; a step the reference pass already
took is reused, not stepped again.
"""

from __future__ import annotations

import copy
import hashlib
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass

import numpy as np

from errbudget.case.load import Case
from errbudget.estimates import artefacts
from errbudget.estimates.ladder import RATIO
from errbudget.estimates.richardson import richardson
from errbudget.laws.models import stable_equilibria
from errbudget.solve.stream import Level, Mapper, Readout, stream
from errbudget.solve.trajectory import last_index, tail_start

SERIES_POINTS = 400  # most time points kept for the report's time series
SERIES_MEMBERS = 4096  # independent draws kept for the report's bands (first ones of the design)


@dataclass(frozen=True)
class Ensemble:
    """The design's parameter sets and what every pass over them needs.

    Attributes
    ----------
    params : dict of str to ndarray (S,)
        Every parameter of the law and N0 [internal units].
    levels : ndarray (E, S)
        Stable equilibria of each member (NaN where absent) [population].
    members : ndarray of int
        The members whose series and count-time values are kept (independent draws).
    count_times : ndarray or None
        Times of the field counts [time].
    """

    params: dict[str, np.ndarray]
    levels: np.ndarray
    members: np.ndarray
    count_times: np.ndarray | None

    @property
    def size(self) -> int:
        return len(self.params["N0"])


def ensemble_for(case: Case, params: dict, independent_rows, count_times=None) -> Ensemble:
    """The ensemble of ``params`` with its stable levels and the members kept for the series."""
    law = {k: v for k, v in params.items() if k != "N0"}
    size = len(params["N0"])
    found = [np.broadcast_to(eq.value, (size,)) for eq in stable_equilibria(case.model, law)]
    levels = np.array(found, dtype=float).reshape(-1, size)
    members = np.sort(np.asarray(independent_rows))[:SERIES_MEMBERS]
    return Ensemble(dict(params), levels, members, count_times)


@dataclass(frozen=True)
class ReferencePass:
    """Per-member results of the case's step against the reference levels.

    Attributes
    ----------
    case_values : ndarray (Q, S) -- quantities at the case's step
    reference : ndarray (Q, S) -- Richardson extrapolation of the finer and finest levels
    masks : dict of str to bool ndarray (S,) -- artefacts at the case's step
    scale : float -- largest |N| on the finest level [population]
    series_index : ndarray -- case-grid indices kept for the series
    series_coarse, series_fine : ndarray (T_s, M) -- case's step and finest level there
    count_values : ndarray (T_c, M) or None -- finest level at the count times
    finer_step, finest_step : float [time]
    levels : dict of float to Level -- every level stepped, by step
    """

    case_values: np.ndarray
    reference: np.ndarray
    masks: dict
    scale: float
    series_index: np.ndarray
    series_coarse: np.ndarray
    series_fine: np.ndarray
    count_values: np.ndarray | None
    finer_step: float
    finest_step: float
    levels: dict[float, Level]

    @property
    def finest(self) -> Level:
        return self.levels[self.finest_step]


def series_index(case: Case) -> np.ndarray:
    """Grid indices of the case's step kept for the report's series (at most SERIES_POINTS)."""
    last = last_index(case.horizon, case.step)
    return np.unique(np.linspace(0, last, min(last + 1, SERIES_POINTS)).round().astype(int))


def case_level(
    case: Case,
    ensemble: Ensemble,
    progress: Callable[[int], None] | None = None,
    mapper: Mapper | None = None,
) -> Level:
    """The case's step over every member, with the states the report's series keep.

    ``mapper`` runs the chunks of members as tasks (see :func:`errbudget.solve.stream.stream`),
    here and in the other passes.
    """
    readout = Readout(keep={case.step: series_index(case)}, keep_members=ensemble.members)
    return stream(
        case, ensemble.params, [case.step], levels=ensemble.levels, readout=readout,
        progress=progress, mapper=mapper,
    )[0]  # fmt: skip


def reference_pass(
    case: Case,
    ensemble: Ensemble,
    order: int,
    finer_step: float,
    finest_step: float,
    reuse: Mapping[float, Level] | None = None,
    progress: Callable[[int], None] | None = None,
    mapper: Mapper | None = None,
) -> ReferencePass:
    """Step the case's step and the two reference levels over every member, once each.

    Levels in ``reuse`` (by step) are taken as they are: the case's step from
    :func:`case_level`, which does not depend on the reference levels.
    """
    index = series_index(case)
    stride = round(case.step / finest_step)
    case_tail = tail_start(last_index(case.horizon, case.step))
    readout = Readout(
        keep={case.step: index, finest_step: index * stride},
        keep_members=ensemble.members,
        count_times=ensemble.count_times,
        count_step=finest_step if ensemble.count_times is not None else None,
        count_members=ensemble.members,
        # The accurate level's late window starts where the case's step's does.
        tails={finest_step: case_tail * stride},
    )
    known = dict(reuse or {})
    wanted = [h for h in (finest_step, finer_step, case.step) if h not in known]
    if wanted:
        stepped = stream(
            case, ensemble.params, wanted, levels=ensemble.levels, readout=readout,
            progress=progress, mapper=mapper,
        )  # fmt: skip
        known.update({level.step: level for level in stepped})
    coarse, finer, finest = known[case.step], known[finer_step], known[finest_step]
    masks = artefacts.judge(coarse.features, finest.features, ensemble.levels)
    return ReferencePass(
        case_values=coarse.values,
        reference=richardson(finest.values, finer.values, RATIO, order),
        masks=masks,
        scale=float(np.max(finest.features.scale)),
        series_index=index,
        series_coarse=coarse.kept,
        series_fine=finest.kept,
        count_values=finest.counted,
        finer_step=finer_step,
        finest_step=finest_step,
        levels={h: known[h] for h in (case.step, finer_step, finest_step)},
    )


class Candidates:
    """Candidate steps over the ensemble, stepped on first request and remembered.

    Each candidate is judged against the finest level of ``passed`` (its features, kept from
    the reference pass), so no reference level is stepped again.
    """

    def __init__(
        self,
        case: Case,
        ensemble: Ensemble,
        passed: ReferencePass,
        progress: Callable[[int], None] | None = None,
        mapper: Mapper | None = None,
    ):
        self.case = case
        self.ensemble = ensemble
        self.finest = passed.finest
        self.levels: dict[float, Level] = dict(passed.levels)
        self.progress = progress
        self.mapper = mapper
        self.weights: np.ndarray | None = None
        self.orders: dict[bytes, np.ndarray] = {}  # argsort of values seen, shared by views

    def weighted(self, weights: np.ndarray) -> Candidates:
        """The same candidates (one cache of levels), judged with member weights."""
        view = copy.copy(self)
        view.weights = np.asarray(weights, dtype=float)
        return view

    def percentile(self, values: np.ndarray, q: float) -> float:
        """The q-th percentile over members, weighted when the view carries weights.

        Weighted: ``np.percentile(values, q, weights=w, method="inverted_cdf")`` step for
        step (numpy 2.x), with the sort of ``values`` done once and shared by every weighted
        view: the search judges the same errors under the weights of each input in turn.
        """
        if self.weights is None:
            return float(np.percentile(values, q))
        values = np.asarray(values, dtype=float)
        if np.isnan(values).any():
            return math.nan
        key = hashlib.blake2b(values.tobytes(), digest_size=16).digest()
        order = self.orders.get(key)
        if order is None:
            order = self.orders.setdefault(key, np.argsort(values))
        cdf = self.weights[order].cumsum(dtype=np.float64)
        cdf /= cdf[-1]
        if not math.isfinite(cdf[-1]):
            raise ValueError("weights are NaN, infinite or all zero")
        if cdf[0] == 0:
            cdf[cdf == 0] = -1  # leading zero weights: pick the first member that counts
        index = min(int(np.searchsorted(cdf, np.true_divide(q, 100), side="left")), cdf.size - 1)
        return float(values[order[index]])

    def level(self, step: float) -> Level:
        """The ensemble at ``step`` (stepped now unless already known)."""
        if step not in self.levels:  # shared by every weighted view
            found = stream(
                self.case, self.ensemble.params, [step], levels=self.ensemble.levels,
                progress=self.progress, mapper=self.mapper,
            )[0]  # fmt: skip
            self.levels[step] = found
        return self.levels[step]

    def artefacts(self, step: float) -> list[str]:
        """Artefact codes present anywhere in the ensemble at ``step``."""
        found = artefacts.judge(
            self.level(step).features, self.finest.features, self.ensemble.levels
        )
        counted = np.ones(self.ensemble.size, bool) if self.weights is None else self.weights > 0
        return [code for code in artefacts.CODES if (found[code] & counted).any()]
