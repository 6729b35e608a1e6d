"""``kind: arima_search``: ARIMA orders chosen per training window by a stepwise search.

The procedure of Hyndman, R.J., Khandakar, Y. (2008), "Automatic time series forecasting: the
forecast package for R", *Journal of Statistical Software* 27(3), built here on statsmodels:

1. Seasonal differencing D (0 or 1, only when the season m > 1): the series is differenced once
   at lag m when its seasonal strength ``F_s = max(0, 1 - Var(R) / Var(S + R))`` from an STL
   decomposition exceeds 0.64 (the measure of Wang, Smith & Hyndman 2006, "Characteristic-based
   clustering for time series data", Data Mining and Knowledge Discovery 13; the 0.64 threshold
   is from memory of its use in later versions of the same software). The 2008 paper used the
   Canova-Hansen test here; the strength rule is what we implement.
2. Differencing d: KPSS tests of level stationarity (Kwiatkowski, Phillips, Schmidt & Shin
   1992, "Testing the null hypothesis of stationarity against the alternative of a unit root",
   J. Econometrics 54; with their short truncation lag ``int(4 (n/100)^(1/4))``) in sequence on
   the (seasonally differenced) series: while the test rejects at ``alpha`` (5%), difference
   once more, up to ``d_up_to``. statsmodels' p-values are interpolated in the KPSS table and
   clipped to [0.01, 0.1].
3. Stepwise search over (p, q, P, Q, constant) with d and D fixed, by AICc, as Hyndman &
   Athanasopoulos describe it (*Forecasting: Principles and Practice*, 3rd ed., 2021, section
   9.7): fit the four starting models (2,d,2)(1,D,1), (0,d,0)(0,D,0), (1,d,0)(1,D,0),
   (0,d,1)(0,D,1) (seasonal parts only when m > 1) with a constant unless d + D = 2, and,
   when d + D <= 1, also (0,d,0)(0,D,0) without one; the best is the current model. Then
   consider its variations -- p and/or q changed by +-1 (all eight moves), the same for P
   and/or Q, the constant included or dropped -- and make the best of them the current model
   if its AICc is lower; repeat until no variation is lower. Orders are bounded by
   ``p_up_to``, ``q_up_to``, ``P_up_to``, ``Q_up_to`` and ``p + q + P + Q <= terms_up_to``,
   and at most ``fits_up_to`` models are fitted (the search stops with the best so far).

   Checked against FPP2 section 8.5: on the uschange consumption series (non-seasonal) the
   search ends at the book's ARIMA(1,0,3) with a mean, AICc 342.08, although ARIMA(3,0,0)
   with a mean has a lower AICc (340.67): a stepwise search finds a local minimum.

A candidate is discarded when its optimiser does not converge, its AICc is not finite, or an
AR or MA root lies within 1.01 of the unit circle (the paper rejects models close to
non-stationarity or non-invertibility; the 1.01 margin is our choice). With covariates, d and
D are chosen on the residuals of a least-squares fit of y on them, and every candidate is a
regression with ARIMA errors. The constant is statsmodels' ``c`` when d + D = 0 and a drift
``t`` when d + D = 1 (a constant in the differenced series).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from runner.forecasters.contract import Forecast
from runner.forecasters.models._common import (
    ConvergenceError,
    boolean,
    covariate_matrix,
    need_length,
    number,
    positive_int,
    quiet,
    season_length,
    series,
)
from runner.forecasters.models.arima import minimum_length, predict_fitted

SEASONAL_STRENGTH_THRESHOLD = 0.64
ROOT_MARGIN = 1.01
MIN_LENGTH = 8

Candidate = tuple[int, int, int, int, bool]  # p, q, P, Q, constant


def seasonal_strength(x: np.ndarray, m: int) -> float:
    """``max(0, 1 - Var(remainder) / Var(seasonal + remainder))`` from an STL decomposition."""
    from statsmodels.tsa.seasonal import STL  # here: validating needs no statsmodels

    with quiet():
        fit = STL(x, period=m).fit()
    rem = np.asarray(fit.resid)
    detrended = np.asarray(fit.seasonal) + rem
    denom = float(np.var(detrended))
    if denom <= 0.0:
        return 0.0
    return max(0.0, 1.0 - float(np.var(rem)) / denom)


def choose_seasonal_d(x: np.ndarray, m: int, D_up_to: int) -> int:
    """D = 1 when the seasonal strength exceeds the threshold (needs two full seasons + 1)."""
    if m < 2 or D_up_to < 1 or x.shape[0] < 2 * m + 1:
        return 0
    return 1 if seasonal_strength(x, m) > SEASONAL_STRENGTH_THRESHOLD else 0


def choose_d(x: np.ndarray, d_up_to: int, alpha: float) -> int:
    """Difference while the KPSS test (level stationarity, short lag) rejects at ``alpha``."""
    from statsmodels.tsa.stattools import kpss  # here: see seasonal_strength

    d = 0
    while d < d_up_to and x.shape[0] >= MIN_LENGTH and np.ptp(x) > 0:
        lags = int(4 * (x.shape[0] / 100.0) ** 0.25)
        with quiet():
            p_value = kpss(x, regression="c", nlags=lags)[1]
        if p_value >= alpha:
            break
        x = np.diff(x)
        d += 1
    return d


def _roots_ok(res: Any) -> bool:
    for name in ("arroots", "maroots"):
        roots = np.asarray(getattr(res, name, np.empty(0)))
        if roots.size and np.min(np.abs(roots)) < ROOT_MARGIN:
            return False
    return True


class ArimaSearch:
    """ARIMA with orders chosen per training window (Hyndman & Khandakar 2008, stepwise AICc).

    Parameters
    ----------
    p_up_to, q_up_to:
        Largest non-seasonal AR and MA orders searched.
    P_up_to, Q_up_to:
        Largest seasonal AR and MA orders searched (used only when the season is above 1).
    d_up_to, D_up_to:
        Largest differencing orders the tests may choose (``D_up_to`` at most 1).
    terms_up_to:
        Bound on ``p + q + P + Q``.
    fits_up_to:
        Most models fitted per training window (bounds the run time; 60).
    seasonal:
        ``false`` ignores the dataset's season (a non-seasonal search).
    alpha:
        Level of the KPSS tests.

    After ``fit``, ``info_`` holds the chosen ``order``, ``seasonal_order``, ``trend``, its
    ``aicc`` and how many models were fitted.
    """

    version = "2"  # 2: FPP3 9.7 search (five starts, eight p/q moves); intervals over T - K
    uses_covariates = True

    def __init__(
        self,
        p_up_to: Any = 3,
        q_up_to: Any = 3,
        P_up_to: Any = 1,
        Q_up_to: Any = 1,
        d_up_to: Any = 2,
        D_up_to: Any = 1,
        terms_up_to: Any = 5,
        fits_up_to: Any = 60,
        seasonal: Any = True,
        alpha: Any = 0.05,
    ) -> None:
        self.p_up_to = p_up_to
        self.q_up_to = q_up_to
        self.P_up_to = P_up_to
        self.Q_up_to = Q_up_to
        self.d_up_to = d_up_to
        self.D_up_to = D_up_to
        self.terms_up_to = terms_up_to
        self.fits_up_to = fits_up_to
        self.seasonal = seasonal
        self.alpha = alpha
        self._checked()

    def _checked(self) -> None:
        for name in ("p_up_to", "q_up_to", "P_up_to", "Q_up_to", "d_up_to", "terms_up_to"):
            positive_int(getattr(self, name), name)
        if positive_int(self.D_up_to, "D_up_to") > 1:
            raise ValueError(f"D_up_to: expected 0 or 1, got {self.D_up_to}")
        positive_int(self.fits_up_to, "fits_up_to", low=1)
        boolean(self.seasonal, "seasonal")
        alpha = number(self.alpha, "alpha")
        if not 0.0 < alpha < 1.0:
            raise ValueError(f"alpha: expected a level between 0 and 1, got {alpha:g}")

    def _allowed(self, c: Candidate, m: int, integration: int) -> bool:
        p, q, sp, sq, const = c
        if min(p, q, sp, sq) < 0 or p > self.p_up_to or q > self.q_up_to:
            return False
        if m < 2 and (sp or sq):
            return False
        if sp > self.P_up_to or sq > self.Q_up_to or p + q + sp + sq > self.terms_up_to:
            return False
        return not (const and integration > 1)

    def fit(
        self, y: np.ndarray, *, season: int, covariates: np.ndarray | None = None
    ) -> ArimaSearch:
        """Choose d, D and the orders on ``y``, then keep the best model's fit."""
        self._checked()
        y = series(y, "arima_search")
        season = season_length(season, "arima_search")
        n = y.shape[0]
        need_length(n, MIN_LENGTH, "arima_search", "the automatic order search")
        from statsmodels.tsa.arima.model import ARIMA  # here: validating needs no statsmodels

        exog = covariate_matrix(covariates, n, "arima_search", "training")
        m = season if self.seasonal and season > 1 else 1

        x = y
        if exog is not None:
            design = np.column_stack([np.ones(n), exog])
            beta = np.linalg.lstsq(design, y, rcond=None)[0]
            x = y - design @ beta
        big_d = choose_seasonal_d(x, m, int(self.D_up_to))
        if big_d:
            x = x[m:] - x[:-m]
        d = choose_d(x, int(self.d_up_to), float(self.alpha))
        integration = d + big_d
        n_exog = 0 if exog is None else exog.shape[1]

        fitted: dict[Candidate, Any] = {}
        scores: dict[Candidate, float] = {}

        def score(c: Candidate) -> float:
            if c in scores:
                return scores[c]
            scores[c] = np.inf
            if len(fitted) >= int(self.fits_up_to) or not self._allowed(c, m, integration):
                return np.inf
            p, q, sp, sq, const = c
            order = (p, d, q)
            sorder = (sp, big_d, sq, m) if m > 1 else (0, 0, 0, 0)
            if n < minimum_length(order, sorder, int(const), n_exog):
                return np.inf
            trend = ("c" if integration == 0 else "t") if const else "n"
            fitted[c] = None
            with quiet():
                try:
                    res = ARIMA(y, exog=exog, order=order, seasonal_order=sorder, trend=trend).fit()
                except (ValueError, np.linalg.LinAlgError):
                    return np.inf
            retvals = getattr(res, "mle_retvals", None) or {}
            aicc = float(res.aicc)
            if retvals.get("converged") is False or not np.isfinite(aicc) or not _roots_ok(res):
                return np.inf
            fitted[c] = res
            scores[c] = aicc
            return aicc

        with_constant = integration <= 1
        if m > 1:
            starts = [(2, 2, 1, 1), (0, 0, 0, 0), (1, 0, 1, 0), (0, 1, 0, 1)]
        else:
            starts = [(2, 2, 0, 0), (0, 0, 0, 0), (1, 0, 0, 0), (0, 1, 0, 0)]
        candidates = [
            (
                min(p, self.p_up_to),
                min(q, self.q_up_to),
                min(sp, self.P_up_to),
                min(sq, self.Q_up_to),
                with_constant,
            )
            for p, q, sp, sq in starts
        ]
        if with_constant:
            candidates.append((0, 0, 0, 0, False))
        best = self._lowest(candidates, score)
        if best is None:
            raise ConvergenceError(
                f"arima_search: none of the starting models (d={d}, D={big_d}) could be fitted"
            )
        while True:
            move = self._lowest(self._neighbours(best, m), score)
            if move is None or scores[move] >= scores[best]:
                break
            best = move
        res = fitted[best]
        p, q, sp, sq, const = best
        self.result_ = res
        self.n_exog_ = n_exog
        self.info_ = {
            "order": [p, d, q],
            "seasonal_order": [sp, big_d, sq, m] if m > 1 else [0, 0, 0, 0],
            "trend": ("c" if integration == 0 else "t") if const else "n",
            "aicc": round(float(scores[best]), 6),
            "models_fitted": len(fitted),
        }
        return self

    @staticmethod
    def _lowest(
        candidates: list[Candidate], score: Any
    ) -> Candidate | None:
        """The candidate with the lowest finite score (the first one on ties), or None."""
        best: Candidate | None = None
        for c in candidates:
            if np.isfinite(score(c)) and (best is None or score(c) < score(best)):
                best = c
        return best

    @staticmethod
    def _neighbours(c: Candidate, m: int) -> list[Candidate]:
        """FPP3 9.7's variations: p and/or q by +-1, P and/or Q by +-1, the constant toggled."""
        p, q, sp, sq, const = c
        moves = [(a, b) for a in (-1, 0, 1) for b in (-1, 0, 1) if (a, b) != (0, 0)]
        out = [(p + a, q + b, sp, sq, const) for a, b in moves]
        if m > 1:
            out += [(p, q, sp + a, sq + b, const) for a, b in moves]
        out.append((p, q, sp, sq, not const))
        return out

    def predict(
        self,
        horizon: int,
        *,
        covariates: np.ndarray | None = None,
        levels: tuple[float, ...] = (),
    ) -> np.ndarray | Forecast:
        """Forecast ``horizon`` steps with the chosen model (regressors over those steps)."""
        return predict_fitted(self, "arima_search", horizon, covariates, levels)
