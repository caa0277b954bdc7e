"""The arrays behind a scorecard (:class:`Evidence`), how they are built and stored."""

from __future__ import annotations

import os
import zipfile
import zlib
from dataclasses import dataclass
from pathlib import Path
from typing import Any, BinaryIO

import numpy as np

from ergodex import stats
from ergodex.exceptions import DataError, ModelFileError, SettingsError
from ergodex.files import atomic_write_path
from ergodex.regimes import NONE_NAME, mean_residence_times, occupancy, transition_matrix
from ergodex.validation.pieces import PieceSettings, _acf_pieces

EVIDENCE_FORMAT = "ergodex-evidence/1"


_SAMPLE_SIZE = 2000


#: Evidence arrays, in order: name → (dtype kind, description). The report reads these names.
EVIDENCE_FIELDS = {
    "variables": "names of the data-space variables (n_vars,)",
    "hist_edges": "bin edges (n_vars, n_bins + 1)",
    "hist_reference": "reference masses incl. under/overflow (n_vars, n_bins + 2)",
    "hist_reference_pieces": "per reference piece (n_pieces, n_vars, n_bins + 2)",
    "hist_model": "model masses, all surviving members (n_vars, n_bins + 2)",
    "acf_lags": "lags in time units (n_lags,)",
    "acf_reference": "(n_lags, n_vars)",
    "acf_reference_pieces": "(n_pieces, n_lags, n_vars)",
    "acf_model": "(n_lags, n_vars)",
    "psd_freq": "frequencies, cycles per time unit (n_freq,)",
    "psd_reference": "(n_freq, n_vars)",
    "psd_reference_pieces": "(n_pieces, n_freq, n_vars)",
    "psd_model": "(n_freq, n_vars)",
    "regime_names": "regime names, 'none' last (n_regimes + 1,); empty without regimes",
    "occupancy_reference": "(n_regimes + 1,)",
    "occupancy_reference_pieces": "(n_pieces, n_regimes + 1)",
    "occupancy_model": "(n_regimes + 1,)",
    "residence_reference": "mean residence time per regime (n_regimes + 1,)",
    "residence_model": "(n_regimes + 1,)",
    "transitions_reference": "jump-chain transition matrix (n_regimes + 1, n_regimes + 1)",
    "transitions_model": "(n_regimes + 1, n_regimes + 1)",
    "sample_reference": "random reference states (N, n_vars)",
    "sample_model": "random model states (N, n_vars)",
    "blowup_times": "blow-up time per member, NaN where none (n_members,)",
}


@dataclass
class Evidence:
    """The arrays behind a scorecard, for figures and reports (see :data:`EVIDENCE_FIELDS`).

    Stored as NPZ with fixed key names and no pickled objects (names are fixed-width unicode
    arrays), so ``numpy.load(path, allow_pickle=False)`` reads it anywhere.
    """

    variables: np.ndarray
    hist_edges: np.ndarray
    hist_reference: np.ndarray
    hist_reference_pieces: np.ndarray
    hist_model: np.ndarray
    acf_lags: np.ndarray
    acf_reference: np.ndarray
    acf_reference_pieces: np.ndarray
    acf_model: np.ndarray
    psd_freq: np.ndarray
    psd_reference: np.ndarray
    psd_reference_pieces: np.ndarray
    psd_model: np.ndarray
    regime_names: np.ndarray
    occupancy_reference: np.ndarray
    occupancy_reference_pieces: np.ndarray
    occupancy_model: np.ndarray
    residence_reference: np.ndarray
    residence_model: np.ndarray
    transitions_reference: np.ndarray
    transitions_model: np.ndarray
    sample_reference: np.ndarray
    sample_model: np.ndarray
    blowup_times: np.ndarray

    def to_npz(
        self, path: str | os.PathLike, *, extra: dict[str, np.ndarray] | None = None
    ) -> None:
        """Write every array to ``path`` (compressed NPZ, atomically).

        ``extra`` arrays (e.g. a field check's grid maps) are stored beside the fixed ones under
        their own keys; :meth:`from_npz` ignores them, so files with and without them read alike.
        """
        path = Path(path)
        clash = sorted(set(extra or {}) & {*EVIDENCE_FIELDS, "format"})
        if clash:
            raise SettingsError(f"evidence: extra array {clash[0]!r} would replace a fixed field")
        # Any values: numpy's stub types savez's keyword arrays as its own bool option
        arrays: dict[str, Any] = {name: np.asarray(getattr(self, name)) for name in EVIDENCE_FIELDS}
        arrays["format"] = np.array(EVIDENCE_FORMAT)
        arrays.update({key: np.asarray(value) for key, value in (extra or {}).items()})

        def write(tmp: Path) -> None:
            with open(tmp, "wb") as handle:  # a file object: savez must not add ".npz"
                np.savez_compressed(handle, **arrays)

        atomic_write_path(path, write, make_folder=False)

    @classmethod
    def from_npz(cls, source: str | os.PathLike | BinaryIO, *, name: str | None = None) -> Evidence:
        """Read evidence written by :meth:`to_npz`, never unpickling anything.

        Parameters
        ----------
        source : path or binary file object
            The NPZ file, or a readable, seekable binary file object holding its bytes (e.g.
            ``io.BytesIO`` of bytes a registry has verified), which is left open.
        name : str, optional
            What error messages call the file (default: the path, or the file object's name).

        Raises
        ------
        ModelFileError
            When the content is not an evidence file of this format or cannot be read.
        """
        if isinstance(source, (str, os.PathLike)):
            source = Path(source)
            label = name or str(source)
        else:
            label = name or str(getattr(source, "name", "") or "evidence")
        try:
            loaded = np.load(source, allow_pickle=False)
            if not isinstance(loaded, np.lib.npyio.NpzFile):  # a bare .npy array
                raise ModelFileError(f"{label}: not an evidence file of format {EVIDENCE_FORMAT!r}")
            with loaded as z:
                if "format" not in z.files or str(z["format"]) != EVIDENCE_FORMAT:
                    raise ModelFileError(
                        f"{label}: not an evidence file of format {EVIDENCE_FORMAT!r}"
                    )
                missing = [k for k in EVIDENCE_FIELDS if k not in z.files]
                if missing:
                    raise ModelFileError(f"{label}: evidence file lacks {missing}")
                return cls(**{k: z[k] for k in EVIDENCE_FIELDS})
        except ModelFileError:
            raise
        # empty, truncated or corrupt content fails inside numpy, zipfile or zlib
        except (OSError, ValueError, EOFError, zipfile.BadZipFile, zlib.error) as exc:
            raise ModelFileError(f"{label}: cannot read evidence ({exc})") from None


def _model_acf(live: list[np.ndarray], max_lag: int, like: np.ndarray) -> np.ndarray:
    """Autocorrelation of the model output; NaN for a variable that never moves.

    A surrogate that settled on a fixed point is a model failure (the scorecard says so), not
    bad input: its undefined autocorrelation is shown as missing rather than raised.
    """
    try:
        return stats.autocorrelation(live, max_lag)
    except DataError:
        out = np.full_like(like, np.nan)
        for j in range(like.shape[1]):
            try:
                out[:, j] = stats.autocorrelation([x[:, [j]] for x in live], max_lag)[:, 0]
            except DataError:
                continue
        return out


def _evidence(
    reference,
    stacked,
    ref_pieces,
    ref_stats,
    model,
    alive,
    blowup_times,
    spec,
    settings: PieceSettings,
    rng,
) -> Evidence:
    """Arrays for the figures; per-piece reference statistics come from ``ref_stats`` when the
    scored statistics already computed them."""
    variables = settings.variables
    n_vars = len(variables)
    dt = settings.dt
    live = [model[m] for m in np.flatnonzero(alive)]
    pooled = np.concatenate(live) if live else np.full((1, n_vars), np.nan)

    edges = (
        np.stack([stats.histogram_edges(stacked[:, j], spec.bins) for j in range(n_vars)])
        if spec.bins != "fd"
        else None
    )
    if edges is None:  # Freedman–Diaconis gives a different count per variable: use the largest
        counts = [stats.histogram_edges(stacked[:, j], "fd").size - 1 for j in range(n_vars)]
        edges = np.stack([stats.histogram_edges(stacked[:, j], max(counts)) for j in range(n_vars)])

    def hist(x):
        return np.stack([stats.histogram(x[..., j], edges[j]) for j in range(n_vars)])

    max_lag = settings.max_lag_samples
    acf_ref = stats.autocorrelation(list(reference.runs), max_lag)
    freq, psd_ref = stats.power_spectrum(list(reference.runs), dt, nperseg=settings.nperseg)
    if hasattr(ref_stats, "psd"):
        psd_pieces = ref_stats.psd
    else:
        psd_pieces = stats.welch_psd(
            np.ascontiguousarray(ref_pieces.transpose(0, 2, 1)), dt, settings.nperseg
        )[1].transpose(0, 2, 1)
    acf_pieces = ref_stats.acf if hasattr(ref_stats, "acf") else _acf_pieces(ref_pieces, max_lag)
    if live:
        acf_mod = _model_acf(live, max_lag, acf_ref)
        psd_mod = stats.power_spectrum(live, dt, nperseg=settings.nperseg)[1]
    else:
        acf_mod = np.full_like(acf_ref, np.nan)
        psd_mod = np.full_like(psd_ref, np.nan)

    regimes = settings.regimes
    if regimes is not None:
        nr = regimes.n_regimes
        names = np.array(list(regimes.names) + [NONE_NAME])
        ref_labels = [regimes.classify(r, variables) for r in reference.runs]
        mod_labels = [regimes.classify(x, variables) for x in live]
        occ_ref = occupancy(ref_labels, nr)
        occ_pieces = ref_stats.occ  # regimes in settings: _PieceStats always computes occupancy
        res_ref = mean_residence_times(ref_labels, dt, nr)
        trans_ref = transition_matrix(ref_labels, nr)
        if live:
            occ_mod = occupancy(mod_labels, nr)
            res_mod = mean_residence_times(mod_labels, dt, nr)
            trans_mod = transition_matrix(mod_labels, nr)
        else:
            occ_mod, res_mod = np.full(nr + 1, np.nan), np.full(nr + 1, np.nan)
            trans_mod = np.full((nr + 1, nr + 1), np.nan)
    else:
        names = np.array([], dtype="<U1")
        occ_ref = occ_mod = res_ref = res_mod = np.zeros(0)
        occ_pieces = np.zeros((ref_pieces.shape[0], 0))
        trans_ref = trans_mod = np.zeros((0, 0))

    def sample(x):
        x = x[np.all(np.isfinite(x), axis=1)]
        if x.shape[0] == 0:
            return np.zeros((0, n_vars))
        idx = np.sort(rng.integers(0, x.shape[0], size=min(_SAMPLE_SIZE, x.shape[0])))
        return x[idx]

    return Evidence(
        variables=np.array(variables),
        hist_edges=edges,
        hist_reference=hist(stacked),
        hist_reference_pieces=np.stack([hist(p) for p in ref_pieces]),
        hist_model=hist(pooled),
        acf_lags=np.arange(max_lag + 1) * dt,
        acf_reference=acf_ref,
        acf_reference_pieces=acf_pieces,
        acf_model=acf_mod,
        psd_freq=freq,
        psd_reference=psd_ref,
        psd_reference_pieces=psd_pieces,
        psd_model=psd_mod,
        regime_names=names,
        occupancy_reference=occ_ref,
        occupancy_reference_pieces=occ_pieces,
        occupancy_model=occ_mod,
        residence_reference=res_ref,
        residence_model=res_mod,
        transitions_reference=trans_ref,
        transitions_model=trans_mod,
        sample_reference=sample(stacked),
        sample_model=sample(pooled),
        blowup_times=np.asarray(blowup_times, float),
    )
