"""Privacy accounting per device, and what a uniform-sampling analysis would claim beside it.

A workload with ``workload.privacy`` clips each update to ``clipping_norm`` and adds Gaussian
noise of standard deviation ``noise_multiplier`` x ``clipping_norm`` to each committed round's
sum: one release of the Gaussian mechanism per round, of sensitivity ``clipping_norm`` when one
device's update is added or removed (user level: a device is one user). Two figures, both in
Renyi differential privacy (RDP, Mironov 2017) and both turned into (epsilon, delta) the same way:

* per device, from its own participations: a device whose report k committed rounds used is
  the Gaussian mechanism composed k times, RDP k x alpha / (2 sigma^2) at order alpha
  (Mironov 2017: the Gaussian mechanism's RDP, composed by Proposition 1), with no
  amplification by sampling: who took part is known, so it hides nothing. A device that never
  reported is in no release: epsilon 0.
* the claim of a uniform-sampling analysis: every committed round samples each device
  independently with probability q = target_reports / devices (Poisson sampling), the
  Sampled Gaussian Mechanism over all committed rounds (Mironov, Talwar and Zhang 2019: their
  closed form at integer orders, the defining integral by quadrature at fractional ones).

The conversion to (epsilon, delta) minimises over a grid of orders the bound of Canonne,
Kamath and Steinke 2020 (Proposition 12; also in Balle et al. 2020), tighter than Mironov's
epsilon = rdp + log(1/delta) / (alpha - 1) (Mironov 2017, Proposition 3), which
:func:`epsilon_from_rdp` also gives (``conversion="standard"``). Vectorised: epsilon depends only on a device's count of
participations, so it is computed once per distinct count.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, Literal

import numpy as np
import pandas as pd
from scipy.special import gammaln, logsumexp

__all__ = ["ORDERS", "PRIVACY_CAUTION", "PRIVACY_TABLES", "PrivacyAccount", "gaussian_rdp",
           "sampled_gaussian_rdp", "epsilon_from_rdp", "device_epsilons", "uniform_sampling_epsilon",
           "privacy_account", "privacy_summary", "privacy_by_device"]

ORDERS = np.concatenate([1.0 + np.arange(1, 100) / 10.0, np.arange(11.0, 64.0), [128.0, 256.0, 512.0, 1024.0]])
"""The RDP orders the figures are minimised over: 1.1 to 10.9 by tenths, 11 to 63, 128 to 1024
(the grid in common use, the RDP accountant of dp-accounting's default, so that the tests
compare order for order)."""

PRIVACY_TABLES = {"device_type": "privacy_by_device_type", "region": "privacy_by_region"}
"""The tables of the per-device privacy figures by grouping."""

PRIVACY_CAUTION = (
    "The privacy figures are an accounting of simulated rounds under the workload's configured "
    "clipping and noise: they hold for a live fleet only if its aggregation clips and adds noise "
    "exactly so, every release of a device's update is counted, and whether a device takes part "
    "does not depend on its data. Have them checked in your organisation's privacy review before "
    "they are quoted or a live fleet's settings are changed on their strength."
)

_GROUP_FIGURES = ("devices", "reporting_devices", "participations_max", "epsilon_median", "epsilon_p90",
                  "epsilon_p99", "epsilon_worst", "devices_over_uniform_claim")


def gaussian_rdp(orders: Any, noise_multiplier: float) -> np.ndarray:
    """RDP of one release of the Gaussian mechanism of sensitivity 1 and noise std
    ``noise_multiplier`` at each order: alpha / (2 sigma^2) (Mironov 2017)."""
    return np.asarray(orders, dtype=float) / (2.0 * noise_multiplier**2)


def sampled_gaussian_rdp(orders: Any, noise_multiplier: float, q: float) -> np.ndarray:
    """RDP of one release of the Poisson-subsampled Gaussian mechanism at each order:
    log A / (alpha - 1), with A = E_{z ~ N(0, sigma^2)} [((1 - q) + q exp((2z - 1) / (2 sigma^2)))^alpha]
    the moment of the likelihood ratio of the mixture (1 - q) N(0, sigma^2) + q N(1, sigma^2)
    to N(0, sigma^2) (Mironov, Talwar and Zhang 2019, Section 3). An integer order takes their
    closed form (:func:`_log_a_integer`), a fractional one the integral by quadrature
    (:func:`_log_a_fractional`); below a noise multiplier of 0.05 (where the quadrature's grid
    would grow past a million points and epsilon is in any case huge) a fractional order takes
    the next integer order's value, an upper bound as Renyi divergence does not decrease with
    the order (van Erven and Harremoes 2014)."""
    orders = np.asarray(orders, dtype=float)
    if q <= 0.0:
        return np.zeros_like(orders)
    if q >= 1.0:
        return gaussian_rdp(orders, noise_multiplier)
    whole = np.abs(orders - np.round(orders)) < 1e-9
    if noise_multiplier < _QUADRATURE_SIGMA:
        above = np.ceil(orders - 1e-9)
        return np.maximum(_log_a_integer(above, noise_multiplier, q), 0.0) / (above - 1.0)
    log_a = np.empty_like(orders)
    log_a[whole] = _log_a_integer(np.round(orders[whole]), noise_multiplier, q)
    log_a[~whole] = _log_a_fractional(orders[~whole], noise_multiplier, q)
    return np.maximum(log_a, 0.0) / (orders - 1.0)


def _log_a_integer(alphas: np.ndarray, sigma: float, q: float) -> np.ndarray:
    """log A at integer orders by the binomial expansion (Mironov, Talwar and Zhang 2019,
    Section 3.3): A = sum_{k=0}^{alpha} C(alpha, k) (1-q)^(alpha-k) q^k exp((k^2 - k) / (2 sigma^2)),
    every term positive, summed in log space."""
    if not alphas.size:
        return np.zeros(0)
    a = alphas[:, None]
    k = np.arange(alphas.max() + 1.0)[None, :]
    inside = k <= a
    with np.errstate(invalid="ignore"):
        log_binomial = gammaln(a + 1.0) - gammaln(k + 1.0) - gammaln(np.where(inside, a - k, 0.0) + 1.0)
        terms = log_binomial + (a - k) * np.log1p(-q) + k * np.log(q) + (k * k - k) / (2.0 * sigma**2)
    return logsumexp(np.where(inside, terms, -np.inf), axis=1)


_STEPS_PER_SIGMA = 50
_TAIL_SIGMAS = 40.0
_QUADRATURE_SIGMA = 0.05


def _log_a_fractional(alphas: np.ndarray, sigma: float, q: float) -> np.ndarray:
    """log A at fractional orders: the expectation over z ~ N(0, sigma^2) by the trapezoid rule
    in log space, on a grid of sigma / 50 from -40 sigma to alpha + 40 sigma (the integrand is a
    smooth bump of width about sigma between 0 and alpha, where the q part peaks). The sum is
    divided by the same rule's sum of the normal density, so the rule's own error cancels."""
    if not alphas.size:
        return np.zeros(0)
    step = sigma / _STEPS_PER_SIGMA
    z = np.arange(-_TAIL_SIGMAS * sigma, alphas.max() + _TAIL_SIGMAS * sigma + step, step)
    log_density = -z * z / (2.0 * sigma**2)
    log_ratio = np.logaddexp(np.log1p(-q), np.log(q) + (2.0 * z - 1.0) / (2.0 * sigma**2))
    return logsumexp(log_density[None, :] + alphas[:, None] * log_ratio[None, :], axis=1) - logsumexp(log_density)


def epsilon_from_rdp(orders: Any, rdp: Any, delta: float,
                     conversion: Literal["improved", "standard"] = "improved") -> np.ndarray:
    """Epsilon at ``delta`` of a mechanism with RDP ``rdp`` at ``orders`` (last axis), the
    minimum over the orders (a scalar for one curve, else one value per curve).

    ``improved`` (the figures use it): rdp + log((alpha-1)/alpha) - (log delta + log alpha) /
    (alpha - 1) (Canonne, Kamath and Steinke 2020, Proposition 12), orders at or below 1.01
    left out as it is unstable there; and epsilon 0 where the RDP alone bounds the total
    variation below delta, sqrt(1 - exp(-rdp)) <= delta (Bretagnolle and Huber 1979, with the
    Kullback-Leibler divergence at most the Renyi divergence of any order above 1).
    ``standard``: rdp + log(1/delta) / (alpha - 1) (Mironov 2017, Proposition 3)."""
    a = np.asarray(orders, dtype=float)
    r = np.asarray(rdp, dtype=float)
    if conversion == "standard":
        eps = r + np.log(1.0 / delta) / (a - 1.0)
    else:
        eps = r + np.log1p(-1.0 / a) - (np.log(delta) + np.log(a)) / (a - 1.0)
        eps = np.where(a > 1.01, eps, np.inf)
        eps = np.where(delta**2 + np.expm1(-r) > 0.0, 0.0, eps)
    return np.maximum(eps.min(axis=-1), 0.0)


def device_epsilons(counts: Any, noise_multiplier: float, delta: float, orders: Any = ORDERS) -> np.ndarray:
    """Epsilon of each device that took part ``counts[i]`` times: the Gaussian mechanism
    composed that many times (RDP adds up, Mironov 2017, Proposition 1); 0 for no participation.
    One conversion per distinct count, looked up for every device."""
    counts = np.asarray(counts, dtype=np.int64)
    if counts.size == 0:
        return np.zeros(0)
    present = np.flatnonzero(np.bincount(counts))
    present = present[present > 0]
    table = np.zeros(int(counts.max()) + 1)
    if present.size:
        curve = gaussian_rdp(orders, noise_multiplier)
        table[present] = epsilon_from_rdp(orders, present[:, None] * curve[None, :], delta)
    return table[counts]


def uniform_sampling_epsilon(q: float, steps: int, noise_multiplier: float, delta: float,
                             orders: Any = ORDERS) -> float:
    """Epsilon a uniform-sampling analysis claims: ``steps`` releases of the Sampled Gaussian
    Mechanism with sampling rate ``q``, composed (0 for no release)."""
    if steps <= 0:
        return 0.0
    return float(epsilon_from_rdp(orders, steps * sampled_gaussian_rdp(orders, noise_multiplier, q), delta))


@dataclass(frozen=True)
class PrivacyAccount:
    """One workload's privacy figures: its settings, the ``delta`` used, the committed rounds
    and sampling rate of the uniform claim, and per device its used reports in committed
    rounds (``participations``), ``epsilon`` and labels (codes into the name tuples)."""

    clipping_norm: float
    noise_multiplier: float
    delta: float
    committed_rounds: int
    sampling_rate: float
    participations: np.ndarray
    epsilon: np.ndarray
    epsilon_uniform_sampling: float
    device_type: np.ndarray
    region: np.ndarray
    type_names: tuple[str, ...]
    region_names: tuple[str, ...]

    def group_table(self, grouping: str) -> pd.DataFrame:
        """``privacy_by_device_type`` or ``privacy_by_region``: per group of the fleet file, its
        devices, those that reported, the most participations, epsilon quantiles over its
        reporting devices (numpy's linear interpolation) and worst, the uniform claim and the
        share of its devices whose own epsilon exceeds that claim."""
        codes, names = ((self.device_type, self.type_names) if grouping == "device_type"
                        else (self.region, self.region_names))
        claim = self.epsilon_uniform_sampling
        rows = []
        for code, name in enumerate(names):
            mine = codes == code
            rows.append({grouping: name, **_figures(self.participations[mine], self.epsilon[mine], claim),
                         "epsilon_uniform_sampling": claim})
        columns = [grouping, *_GROUP_FIGURES[:7], "epsilon_uniform_sampling", _GROUP_FIGURES[7]]
        return pd.DataFrame(rows, columns=columns)

    def tables(self) -> dict[str, pd.DataFrame]:
        """The run's privacy tables by name (never one row per device)."""
        return {table: self.group_table(grouping) for grouping, table in PRIVACY_TABLES.items()}

    def by_device(self) -> pd.DataFrame:
        """One row per device of the fleet: ``device``, ``device_type``, ``region``,
        ``participations`` (used reports in committed rounds) and ``epsilon``."""
        return pd.DataFrame({
            "device": np.arange(self.participations.size),
            "device_type": pd.Categorical.from_codes(self.device_type, self.type_names),
            "region": pd.Categorical.from_codes(self.region, self.region_names),
            "participations": self.participations,
            "epsilon": self.epsilon,
        })

    def summary(self, tables: dict[str, pd.DataFrame] | None = None) -> dict[str, Any]:
        """``privacy`` of summary.json (docs/metrics.md); ``tables`` if already built."""
        tables = self.tables() if tables is None else tables
        counts, eps, claim = self.participations, self.epsilon, self.epsilon_uniform_sampling
        whole = _figures(counts, eps, claim)
        return {
            "clipping_norm": self.clipping_norm,
            "noise_multiplier": self.noise_multiplier,
            "delta": self.delta,
            "committed_rounds": self.committed_rounds,
            "sampling_rate": self.sampling_rate,
            "devices": whole["devices"],
            "reporting_devices": whole["reporting_devices"],
            "never_reported": whole["devices"] - whole["reporting_devices"],
            "participations_max": whole["participations_max"],
            "epsilon": {key: whole[f"epsilon_{key}"] for key in ("median", "p90", "p99", "worst")},
            "epsilon_uniform_sampling": claim,
            "devices_over_uniform_claim": whole["devices_over_uniform_claim"],
            "worst_device": self._worst_device(),
            **{f"by_{grouping}": _group_map(tables[table], grouping) for grouping, table in PRIVACY_TABLES.items()},
        }

    def _worst_device(self) -> dict[str, Any] | None:
        if not self.participations.size or self.participations.max() == 0:
            return None
        # Epsilon grows with the count, so the device with the most participations is the worst
        # (the lowest index on a tie).
        i = int(np.argmax(self.participations))
        return {"device": i, "device_type": self.type_names[self.device_type[i]],
                "region": self.region_names[self.region[i]],
                "participations": int(self.participations[i]), "epsilon": float(self.epsilon[i]),
                "tied": int(np.count_nonzero(self.participations == self.participations[i]))}


def _figures(counts: np.ndarray, eps: np.ndarray, claim: float) -> dict[str, Any]:
    """Counts and epsilon figures of a set of devices (quantiles over those that reported)."""
    reported = eps[counts > 0]
    p50, p90, p99 = (np.quantile(reported, [0.5, 0.9, 0.99]) if reported.size else (np.nan,) * 3)
    return {
        "devices": int(counts.size),
        "reporting_devices": int(reported.size),
        "participations_max": int(counts.max()) if counts.size else 0,
        "epsilon_median": float(p50), "epsilon_p90": float(p90), "epsilon_p99": float(p99),
        "epsilon_worst": float(eps.max()) if eps.size else np.nan,
        "devices_over_uniform_claim": float((eps > claim).mean()) if eps.size else np.nan,
    }


def _group_map(table: pd.DataFrame, grouping: str) -> dict[str, dict[str, Any]]:
    keep = [key for key in _GROUP_FIGURES if key != "participations_max"]
    return {str(row[grouping]): {key: row[key] for key in keep} for row in table.to_dict("records")}


def _labels(devices: Any) -> tuple[np.ndarray, np.ndarray, tuple[str, ...], tuple[str, ...]]:
    """Type and region codes and names of a :class:`fleetsim.fleet.Fleet` or of a frame with
    Categorical ``device_type`` and ``region`` columns (``Fleet.frame()``)."""
    if isinstance(devices, pd.DataFrame):
        types, regions = devices["device_type"].astype("category"), devices["region"].astype("category")
        return (types.cat.codes.to_numpy(), regions.cat.codes.to_numpy(),
                tuple(map(str, types.cat.categories)), tuple(map(str, regions.cat.categories)))
    return (np.asarray(devices.device_type), np.asarray(devices.region),
            tuple(devices.type_names), tuple(devices.region_names))


def privacy_account(config: Any, participations: pd.DataFrame, rounds: pd.DataFrame,
                    devices: Any) -> PrivacyAccount | None:
    """The privacy figures of one workload's run (``config`` a Config of one workload, its
    event log and rounds, and the fleet); None when the workload has no ``privacy``.

    Only rounds with status ``committed`` count, and within them only rows with ``used``."""
    settings = config.workload.privacy
    if settings is None:
        return None
    type_codes, region_codes, type_names, region_names = _labels(devices)
    n = int(type_codes.size)
    status = rounds["status"].astype(str).to_numpy()
    committed = rounds["round"].to_numpy()[status == "committed"]
    used = participations["used"].to_numpy(dtype=bool) & np.isin(participations["round"].to_numpy(), committed)
    counts = np.bincount(participations["device"].to_numpy()[used].astype(np.int64), minlength=n)
    delta = float(settings.delta) if settings.delta is not None else 1.0 / max(n, 1)
    sigma = float(settings.noise_multiplier)
    q = min(1.0, config.rounds.target_reports / n) if n else 0.0
    return PrivacyAccount(
        clipping_norm=float(settings.clipping_norm), noise_multiplier=sigma, delta=delta,
        committed_rounds=int(committed.size), sampling_rate=q, participations=counts,
        epsilon=device_epsilons(counts, sigma, delta),
        epsilon_uniform_sampling=uniform_sampling_epsilon(q, int(committed.size), sigma, delta),
        device_type=type_codes, region=region_codes, type_names=type_names, region_names=region_names,
    )


def privacy_summary(config: Any, participations: pd.DataFrame, rounds: pd.DataFrame,
                    devices: Any) -> dict[str, Any] | None:
    """``privacy`` of summary.json (JSON-able after :func:`fleetsim.metrics.summary.clean`),
    or None when the workload has no ``privacy``."""
    account = privacy_account(config, participations, rounds, devices)
    return None if account is None else account.summary()


def privacy_by_device(config: Any, participations: pd.DataFrame, rounds: pd.DataFrame,
                      devices: Any) -> pd.DataFrame | None:
    """One row per device (``device``, ``device_type``, ``region``, ``participations``,
    ``epsilon``), or None when the workload has no ``privacy``."""
    account = privacy_account(config, participations, rounds, devices)
    return None if account is None else account.by_device()
