"""Capital-market assumptions: expected return and volatility per asset plus a correlation matrix.

An assumptions file replaces a history when the user has forward-looking
estimates rather than data. Two formats are read (both in decimals, per period of
the stated frequency, ``annual`` by default):

TOML::

    frequency = "annual"
    assets = ["Domestic Equity", "Government Bonds", "Commodities"]
    expected_return = [0.065, 0.030, 0.040]
    volatility = [0.160, 0.055, 0.180]
    correlation = [
        [1.00, 0.10, 0.30],
        [0.10, 1.00, -0.10],
        [0.30, -0.10, 1.00],
    ]

CSV (one row per asset; the correlation columns are named after the assets, in
the same order; either triangle may be left blank and is filled from the other)::

    asset,expected_return,volatility,Domestic Equity,Government Bonds,Commodities
    Domestic Equity,0.065,0.160,1.00,,
    Government Bonds,0.030,0.055,0.10,1.00,
    Commodities,0.040,0.180,0.30,-0.10,1.00

The correlation matrix must be symmetric, have a unit diagonal, lie within
[-1, 1] and be positive semi-definite. A matrix that fails only the last check
can be repaired on request (``repair=True``; ``--repair`` on the command line)
to the nearest correlation matrix in the Frobenius norm, computed by Higham's
alternating projections with Dykstra's correction (N. J. Higham, "Computing the
nearest correlation matrix - a problem from finance", IMA Journal of Numerical
Analysis 22(3), 2002, 329-343, Algorithm 3.3 with W = I).
"""
from __future__ import annotations

import csv
import hashlib
import io
import math
import tomllib
from dataclasses import dataclass
from pathlib import Path
from typing import Optional

import numpy as np

from estimators.core import PERIODS_PER_YEAR, DataError

__all__ = [
    "Assumptions",
    "NearestCorrelation",
    "load_assumptions",
    "nearest_correlation",
    "check_correlation",
    "looks_like_assumptions",
    "describe_assumptions",
]

#: Tolerances of the correlation checks (absolute).
SYMMETRY_TOL = 1e-8
DIAGONAL_TOL = 1e-8
PSD_TOL = 1e-10
#: Smallest eigenvalue a repaired matrix keeps, so that its covariance can be inverted.
REPAIR_EIGENVALUE_FLOOR = 1e-8

_TOML_KEYS = ("frequency", "assets", "expected_return", "volatility", "correlation")


@dataclass(frozen=True)
class Assumptions:
    """Validated capital-market assumptions.

    Attributes
    ----------
    assets : tuple of str, length N
    mean : ndarray, shape (N,)
        Expected simple return per period (decimal).
    volatility : ndarray, shape (N,)
        Standard deviation of the return per period (decimal), > 0.
    correlation : ndarray, shape (N, N)
        The correlation matrix used (repaired when ``repaired``).
    covariance : ndarray, shape (N, N)
        ``volatility[i] * volatility[j] * correlation[i, j]``.
    frequency : str
        The period the numbers refer to (``annual`` unless the file says otherwise).
    source, sha256 : str
        The file and the SHA-256 of its bytes.
    repair_distance : float
        Frobenius norm of (repaired - given) correlation; 0.0 when not repaired.
    repaired : bool
    repair_max_change : float
        Largest absolute change of one correlation by the repair.
    repair_max_pair : tuple or None
        The pair of assets whose correlation changed most.
    min_eigenvalue : float
        Smallest eigenvalue of the correlation matrix used.
    given_min_eigenvalue : float
        Smallest eigenvalue of the correlation matrix as given.
    """

    assets: tuple
    mean: np.ndarray
    volatility: np.ndarray
    correlation: np.ndarray
    covariance: np.ndarray
    frequency: str
    source: str
    sha256: str
    repair_distance: float = 0.0
    repaired: bool = False
    repair_max_change: float = 0.0
    repair_max_pair: Optional[tuple] = None
    min_eigenvalue: float = float("nan")
    given_min_eigenvalue: float = float("nan")

    @property
    def n_assets(self) -> int:
        return len(self.assets)

    @property
    def periods_per_year(self) -> int:
        return PERIODS_PER_YEAR[self.frequency]


@dataclass(frozen=True)
class NearestCorrelation:
    """Result of :func:`nearest_correlation`.

    Attributes
    ----------
    matrix : ndarray, shape (N, N)
        Symmetric, unit diagonal, eigenvalues >= ``min_eigenvalue`` (to rounding).
    distance : float
        Frobenius norm of ``matrix - given``.
    max_change : float
        Largest absolute entry of ``matrix - given``.
    iterations : int
    converged : bool
    """

    matrix: np.ndarray
    distance: float
    max_change: float
    iterations: int
    converged: bool


# --------------------------------------------------------------------------- repair

def _project_psd(a: np.ndarray, floor: float) -> np.ndarray:
    w, v = np.linalg.eigh((a + a.T) / 2.0)
    w = np.maximum(w, floor)
    return (v * w) @ v.T


def nearest_correlation(c, *, min_eigenvalue: float = 0.0, tol: float = 1e-12,
                        max_iter: int = 10_000) -> NearestCorrelation:
    """The nearest correlation matrix to a symmetric matrix, in the Frobenius norm.

    Alternating projections onto the positive semi-definite cone (eigenvalues
    clipped at ``min_eigenvalue``) and onto the unit-diagonal matrices, with
    Dykstra's correction on the first projection: Higham (2002), IMA Journal of
    Numerical Analysis 22(3), 329-343, Algorithm 3.3 with the weight W = I.

    Parameters
    ----------
    c : array_like, shape (N, N)
        Symmetric matrix (its diagonal is replaced by ones).
    min_eigenvalue : float, default 0.0
        Floor on the eigenvalues (0 gives Higham's problem; a small positive value
        keeps the result invertible).
    tol : float, default 1e-12
        Stop when successive iterates and the two projections agree within
        ``tol`` (relative, Frobenius).
    max_iter : int, default 10000

    Returns
    -------
    NearestCorrelation
    """
    a = np.array(c, dtype=float)
    if a.ndim != 2 or a.shape[0] != a.shape[1]:
        raise ValueError(f"need a square matrix, got shape {a.shape}")
    n = a.shape[0]
    if not 0.0 <= min_eigenvalue < 1.0:
        raise ValueError("min_eigenvalue must be in [0, 1)")
    a = (a + a.T) / 2.0
    y = a.copy()
    np.fill_diagonal(y, 1.0)
    ds = np.zeros_like(a)
    converged = False
    it = 0
    for it in range(1, max_iter + 1):
        r = y - ds
        x = _project_psd(r, min_eigenvalue)
        ds = x - r
        y_new = x.copy()
        np.fill_diagonal(y_new, 1.0)
        scale = max(1.0, np.linalg.norm(y_new))
        change = np.linalg.norm(y_new - y) / scale
        gap = np.linalg.norm(y_new - x) / scale
        y = y_new
        if change <= tol and gap <= tol:
            converged = True
            break
    # finish exactly on both sets: clip the spectrum, then rescale to a unit diagonal
    z = _project_psd(y, min_eigenvalue)
    d = np.sqrt(np.diag(z))
    z = z / d[:, None] / d[None, :]
    z = (z + z.T) / 2.0
    np.fill_diagonal(z, 1.0)
    if n == 0:
        return NearestCorrelation(z, 0.0, 0.0, 0, True)
    a_unit = a.copy()
    np.fill_diagonal(a_unit, 1.0)
    diff = z - a_unit
    return NearestCorrelation(matrix=z, distance=float(np.linalg.norm(diff)),
                              max_change=float(np.abs(diff).max()), iterations=it, converged=converged)


# --------------------------------------------------------------------------- checks

def check_correlation(corr: np.ndarray, assets, src: str) -> float:
    """Check symmetry, unit diagonal and bounds; return the smallest eigenvalue.

    Errors name the offending asset or pair. Positive semi-definiteness is left to
    the caller (which may repair), using the returned eigenvalue.
    """
    n = len(assets)
    if corr.shape != (n, n):
        raise DataError(f"{src}: the correlation matrix is {corr.shape[0]} x {corr.shape[1]} "
                        f"but there are {n} assets")
    if not np.isfinite(corr).all():
        i, j = np.argwhere(~np.isfinite(corr))[0]
        raise DataError(f"{src}: correlation of '{assets[i]}' and '{assets[j]}' is not a finite number")
    for i in range(n):
        if abs(corr[i, i] - 1.0) > DIAGONAL_TOL:
            raise DataError(f"{src}: the correlation of '{assets[i]}' with itself is {corr[i, i]:.6g}; "
                            f"the diagonal must be 1")
    out = np.argwhere(np.abs(corr) > 1.0 + 1e-12)
    if out.size:
        i, j = out[0]
        raise DataError(f"{src}: correlation of '{assets[i]}' and '{assets[j]}' is {corr[i, j]:.6g}, "
                        f"outside [-1, 1]")
    asym = np.abs(corr - corr.T)
    if asym.max(initial=0.0) > SYMMETRY_TOL:
        i, j = np.unravel_index(int(np.argmax(asym)), asym.shape)
        i, j = min(i, j), max(i, j)
        raise DataError(f"{src}: the correlation matrix is not symmetric: '{assets[i]}' / '{assets[j]}' "
                        f"is {corr[i, j]:.6g} but '{assets[j]}' / '{assets[i]}' is {corr[j, i]:.6g}")
    return float(np.linalg.eigvalsh((corr + corr.T) / 2.0)[0]) if n else 1.0


def _not_psd_message(corr, assets, src, lam) -> str:
    w, v = np.linalg.eigh((corr + corr.T) / 2.0)
    vec = np.abs(v[:, 0])
    top = [assets[k] for k in np.argsort(-vec)[: min(3, len(assets))]]
    return (f"{src}: the correlation matrix is not positive semi-definite (most negative eigenvalue "
            f"{lam:.4g}; its eigenvector weighs most on {', '.join(repr(t) for t in top)}); no set of "
            f"returns can have these correlations. Fix them, or pass --repair (repair_correlation = "
            f"true in a study) to use the nearest valid correlation matrix (Higham 2002)")


# --------------------------------------------------------------------------- reading

def _read(path) -> tuple:
    p = Path(path)
    if not p.exists():
        raise DataError(f"{p}: assumptions file not found")
    if p.is_dir():
        raise DataError(f"{p}: is a folder, not an assumptions file")
    try:
        data = p.read_bytes()
    except OSError as exc:
        raise DataError(f"{p}: cannot read the assumptions file ({exc.strerror or exc.__class__.__name__})") from None
    if not data.strip():
        raise DataError(f"{p}: the assumptions file is empty")
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise DataError(f"{p}: cannot read the file as UTF-8 text (bad byte at offset {exc.start})") from None
    return p, text, hashlib.sha256(data).hexdigest()


def _number(v, src, what) -> float:
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise DataError(f"{src}: {what} must be a number, not {v!r}")
    if not math.isfinite(v):
        raise DataError(f"{src}: {what} is not a finite number")
    return float(v)


def _parse_toml(src, text):
    try:
        doc = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise DataError(f"{src}: not valid TOML: {exc}") from None
    unknown = [k for k in doc if k not in _TOML_KEYS]
    if unknown and ("data" in doc or "rules" in doc):
        raise DataError(f"{src}: this is a study file, not capital-market assumptions; run "
                        f"'noiseproof study {src}'")
    if unknown:
        raise DataError(f"{src}: unknown key{'s' if len(unknown) > 1 else ''} "
                        f"{', '.join(repr(k) for k in unknown)} (known: {', '.join(_TOML_KEYS)})")
    for key in _TOML_KEYS[1:]:
        if key not in doc:
            raise DataError(f"{src}: missing key '{key}'")
    assets = doc["assets"]
    if not isinstance(assets, list) or not all(isinstance(a, str) for a in assets):
        raise DataError(f"{src}: 'assets' must be a list of names")
    n = len(assets)
    vecs = {}
    for key in ("expected_return", "volatility"):
        v = doc[key]
        if not isinstance(v, list):
            raise DataError(f"{src}: '{key}' must be a list of numbers")
        if len(v) != n:
            raise DataError(f"{src}: '{key}' has {len(v)} values but there are {n} assets")
        vecs[key] = np.array([_number(x, src, f"{key} of '{assets[i]}'") for i, x in enumerate(v)])
    rows = doc["correlation"]
    if not isinstance(rows, list) or len(rows) != n or not all(isinstance(r, list) for r in rows):
        raise DataError(f"{src}: 'correlation' must be a list of {n} rows of {n} numbers")
    corr = np.empty((n, n))
    for i, r in enumerate(rows):
        if len(r) != n:
            raise DataError(f"{src}: correlation row {i + 1} ('{assets[i]}') has {len(r)} values, "
                            f"not {n}")
        for j, x in enumerate(r):
            corr[i, j] = _number(x, src, f"correlation of '{assets[i]}' and '{assets[j]}'")
    freq = doc.get("frequency")
    if freq is not None and freq not in PERIODS_PER_YEAR:
        raise DataError(f"{src}: frequency = {freq!r} is not one of {', '.join(PERIODS_PER_YEAR)}")
    return list(assets), vecs["expected_return"], vecs["volatility"], corr, freq


def _csv_float(cell, src, what):
    try:
        x = float(cell)
    except ValueError:
        raise DataError(f"{src}: {what}: non-numeric value '{cell}'") from None
    if not math.isfinite(x):
        raise DataError(f"{src}: {what}: '{cell}' is not a finite number")
    return x


def _parse_csv(src, text):
    first = next((ln for ln in text.splitlines() if ln.strip()), "")
    delim = "," if "," in first else (";" if ";" in first else ("\t" if "\t" in first else ","))
    rows = [[c.strip() for c in r] for r in csv.reader(io.StringIO(text, newline=""), delimiter=delim)
            if r and any(c.strip() for c in r)]
    header = rows[0]
    lower = [h.lower() for h in header]
    if len(header) < 3 or lower[0] not in ("asset", "assets", "name") or "expected_return" not in lower \
            or "volatility" not in lower:
        raise DataError(f"{src}: an assumptions CSV starts with the columns asset, expected_return, "
                        f"volatility, then one correlation column per asset (got: {', '.join(header[:4])}...)")
    je, jv = lower.index("expected_return"), lower.index("volatility")
    body = rows[1:]
    if not body:
        raise DataError(f"{src}: the file has a header line but no assets")
    assets = [r[0] for r in body]
    n = len(assets)
    corr_cols = [j for j in range(1, len(header)) if j not in (je, jv)]
    names = [header[j] for j in corr_cols]
    if names != assets:
        raise DataError(f"{src}: the correlation columns must be named after the assets in the same order "
                        f"({', '.join(assets)}); got {', '.join(names)}")
    mu, vol = np.empty(n), np.empty(n)
    corr = np.full((n, n), np.nan)
    for i, r in enumerate(body):
        if len(r) != len(header):
            raise DataError(f"{src}: row {i + 1} ('{r[0]}') has {len(r)} fields but the header has "
                            f"{len(header)}")
        if r[je] == "" or r[jv] == "":
            col = "expected_return" if r[je] == "" else "volatility"
            raise DataError(f"{src}: column '{col}', row {i + 1} ('{r[0]}'): missing value")
        mu[i] = _csv_float(r[je], src, f"column 'expected_return', row {i + 1} ('{r[0]}')")
        vol[i] = _csv_float(r[jv], src, f"column 'volatility', row {i + 1} ('{r[0]}')")
        for k, j in enumerate(corr_cols):
            if r[j] != "":
                corr[i, k] = _csv_float(r[j], src, f"column '{header[j]}', row {i + 1} ('{r[0]}')")
    # fill a blank triangle from the other one
    for i in range(n):
        for j in range(n):
            if np.isnan(corr[i, j]):
                if np.isnan(corr[j, i]):
                    if i == j:
                        corr[i, i] = 1.0
                        continue
                    raise DataError(f"{src}: the correlation of '{assets[i]}' and '{assets[j]}' is missing "
                                    f"(give it in at least one triangle)")
                corr[i, j] = corr[j, i]
    return assets, mu, vol, corr, None


def looks_like_assumptions(path) -> bool:
    """True for a ``.toml`` file or a CSV whose header starts ``asset, expected_return, volatility``."""
    p = Path(path)
    if p.suffix.lower() == ".toml":
        return True
    try:
        with open(p, "r", encoding="utf-8-sig", newline="") as fh:
            head = fh.readline()
    except (OSError, UnicodeDecodeError):
        return False
    cells = [c.strip().lower() for c in head.replace(";", ",").replace("\t", ",").split(",")]
    return bool(cells) and cells[0] in ("asset", "assets", "name") and "expected_return" in cells \
        and "volatility" in cells


def load_assumptions(path, *, repair: bool = False, frequency: Optional[str] = None) -> Assumptions:
    """Read and validate capital-market assumptions (TOML or CSV; see the module docstring).

    Parameters
    ----------
    path : str or Path
        ``.toml`` is read as TOML, anything else as CSV.
    repair : bool, default False
        When the correlation matrix is not positive semi-definite, replace it by
        the nearest correlation matrix (Higham 2002) with eigenvalues at least
        ``REPAIR_EIGENVALUE_FLOOR`` and record how far it moved. Other defects
        (asymmetry, diagonal, bounds) are never repaired.
    frequency : str, optional
        The period the numbers refer to; a TOML file may state it itself (they
        must agree). Default ``"annual"``.

    Returns
    -------
    Assumptions

    Raises
    ------
    DataError
        Naming the asset, the pair, or the most negative eigenvalue.
    """
    p, text, sha = _read(path)
    src = str(p)
    if p.suffix.lower() == ".toml":
        assets, mu, vol, corr, ffile = _parse_toml(src, text)
    else:
        assets, mu, vol, corr, ffile = _parse_csv(src, text)
    if frequency is not None and frequency not in PERIODS_PER_YEAR:
        raise DataError(f"frequency must be one of {', '.join(PERIODS_PER_YEAR)}, not {frequency!r}")
    if frequency is not None and ffile is not None and frequency != ffile:
        raise DataError(f"{src}: the file says frequency = '{ffile}' but '{frequency}' was asked for")
    freq = frequency or ffile or "annual"
    n = len(assets)
    if n == 0:
        raise DataError(f"{src}: no assets")
    seen = set()
    for a in assets:
        if not a:
            raise DataError(f"{src}: an asset has an empty name")
        if a in seen:
            raise DataError(f"{src}: asset name '{a}' is used twice")
        seen.add(a)
    for i, a in enumerate(assets):
        if not -1.0 < mu[i] < 1.0:
            raise DataError(f"{src}: expected_return of '{a}' is {mu[i]:.6g}; it must be a decimal "
                            f"above -1 and below 1 (0.065 for 6.5%)")
        if not 0.0 < vol[i] <= 2.0:
            raise DataError(f"{src}: volatility of '{a}' is {vol[i]:.6g}; it must be a decimal above 0 "
                            f"and at most 2 (0.16 for 16%)")
    lam = check_correlation(corr, assets, src)
    corr = (corr + corr.T) / 2.0
    np.fill_diagonal(corr, 1.0)
    given_lam = lam
    repaired = False
    dist = maxc = 0.0
    pair = None
    if lam < -PSD_TOL:
        if not repair:
            raise DataError(_not_psd_message(corr, assets, src, lam))
        res = nearest_correlation(corr, min_eigenvalue=REPAIR_EIGENVALUE_FLOOR)
        if not res.converged:
            raise DataError(f"{src}: the correlation repair did not converge in {res.iterations} iterations")
        diff = np.abs(res.matrix - corr)
        i, j = np.unravel_index(int(np.argmax(diff)), diff.shape)
        i, j = min(i, j), max(i, j)
        pair = (assets[i], assets[j])
        corr, dist, maxc, repaired = res.matrix, res.distance, res.max_change, True
        lam = float(np.linalg.eigvalsh(corr)[0])
    cov = corr * np.outer(vol, vol)
    for arr in (mu, vol, corr, cov):
        arr.setflags(write=False)
    return Assumptions(
        assets=tuple(assets), mean=mu, volatility=vol, correlation=corr, covariance=cov, frequency=freq,
        source=src, sha256=sha, repair_distance=float(dist), repaired=repaired,
        repair_max_change=float(maxc), repair_max_pair=pair, min_eigenvalue=lam,
        given_min_eigenvalue=given_lam,
    )


def describe_assumptions(a: Assumptions) -> dict:
    """A JSON-ready summary of ``a`` (what ``noiseproof inspect`` prints for assumptions).

    Annualised figures use mean x P and volatility x sqrt(P) with P periods a year
    (common practice); for annual assumptions they equal the given numbers.
    """
    ppy = a.periods_per_year
    n = a.n_assets
    d = {
        "type": "assumptions",
        "source": a.source,
        "sha256": a.sha256,
        "frequency": a.frequency,
        "periods_per_year": ppy,
        "annualisation": "mean x periods_per_year, volatility x sqrt(periods_per_year)",
        "assets": [
            {"name": name, "expected_return": float(a.mean[k]), "volatility": float(a.volatility[k]),
             "mean_annualised": float(a.mean[k] * ppy),
             "volatility_annualised": float(a.volatility[k] * math.sqrt(ppy))}
            for k, name in enumerate(a.assets)
        ],
        "min_eigenvalue": a.min_eigenvalue,
        "given_min_eigenvalue": a.given_min_eigenvalue,
        "repaired": a.repaired,
        "repair_distance": a.repair_distance,
        "repair_max_change": a.repair_max_change,
        "repair_max_pair": list(a.repair_max_pair) if a.repair_max_pair else None,
        "correlation_min": None, "correlation_min_pair": None,
        "correlation_max": None, "correlation_max_pair": None,
    }
    if n > 1:
        iu = np.triu_indices(n, 1)
        off = a.correlation[iu]
        lo, hi = int(np.argmin(off)), int(np.argmax(off))
        d["correlation_min"] = float(off[lo])
        d["correlation_min_pair"] = [a.assets[iu[0][lo]], a.assets[iu[1][lo]]]
        d["correlation_max"] = float(off[hi])
        d["correlation_max_pair"] = [a.assets[iu[0][hi]], a.assets[iu[1][hi]]]
    return d


def assumptions_text(d: dict) -> str:
    """Plain-text form of :func:`describe_assumptions`'s dictionary."""
    lines = [
        f"file        {d['source']} (capital-market assumptions)",
        f"sha256      {d['sha256']}",
        f"frequency   {d['frequency']} ({d['periods_per_year']} period{'' if d['periods_per_year'] == 1 else 's'} a year)",
        f"assets      {len(d['assets'])}",
        f"eigenvalue  smallest {d['min_eigenvalue']:.4g}"
        + (f" (given matrix: {d['given_min_eigenvalue']:.4g})" if d["repaired"] else ""),
    ]
    if d["repaired"]:
        pair = d["repair_max_pair"]
        lines.append(f"repaired    nearest correlation matrix (Higham 2002): moved {d['repair_distance']:.4g} "
                     f"(Frobenius); largest change {d['repair_max_change']:.4g} ({pair[0]} / {pair[1]})")
    if d["correlation_min"] is not None:
        lo, hi = d["correlation_min_pair"], d["correlation_max_pair"]
        lines.append(f"correlation {d['correlation_min']:+.2f} ({lo[0]} / {lo[1]}) to "
                     f"{d['correlation_max']:+.2f} ({hi[0]} / {hi[1]})")
    lines.append("")
    ppy = d["periods_per_year"]
    lines.append("annualised: mean x %d, volatility x sqrt(%d) (common practice)" % (ppy, ppy))
    width = max([5] + [len(x["name"]) for x in d["assets"]])
    lines.append(f"{'asset':<{width}}  {'mean':>8}  {'vol':>8}")
    for x in d["assets"]:
        lines.append(f"{x['name']:<{width}}  {x['mean_annualised']:>8.2%}  {x['volatility_annualised']:>8.2%}")
    return "\n".join(lines)
