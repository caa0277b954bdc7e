"""What :func:`ergodex.validation.check` returns: a scorecard and the evidence behind it."""

from __future__ import annotations

from dataclasses import dataclass

from ergodex.validation.evidence import Evidence
from ergodex.validation.scorecard import Scorecard


@dataclass
class CheckResult:
    """A scorecard and the evidence behind it (None when ``check(..., evidence=False)``)."""

    scorecard: Scorecard
    evidence: Evidence | None

    @property
    def passed(self) -> bool:
        return self.scorecard.passed

    def __repr__(self) -> str:
        return f"CheckResult({self.scorecard!r})"

    def _repr_html_(self) -> str:
        return self.scorecard._repr_html_()

    # Figures (see ergodex.plotting): ax=None returns a new Figure, else draws on ax, returns it.
    def plot_histograms(self, *, variables=None, ax=None):
        """Marginal densities, reference and surrogate.

        See :func:`ergodex.plotting.plot_histograms`.
        """
        from ergodex.plotting import plot_histograms

        return plot_histograms(self, variables=variables, ax=ax)

    def plot_autocorrelation(self, *, variables=None, ax=None):
        """Autocorrelation against lag (:func:`ergodex.plotting.plot_autocorrelation`)."""
        from ergodex.plotting import plot_autocorrelation

        return plot_autocorrelation(self, variables=variables, ax=ax)

    def plot_spectra(self, *, variables=None, ax=None):
        """Power spectra on log axes (:func:`ergodex.plotting.plot_spectra`)."""
        from ergodex.plotting import plot_spectra

        return plot_spectra(self, variables=variables, ax=ax)

    def plot_regimes(self, *, ax=None):
        """Regime occupancy and residence times (:func:`ergodex.plotting.plot_regimes`)."""
        from ergodex.plotting import plot_regimes

        return plot_regimes(self, ax=ax)

    def plot_transitions(self, *, ax=None):
        """Regime transition matrices (:func:`ergodex.plotting.plot_transitions`)."""
        from ergodex.plotting import plot_transitions

        return plot_transitions(self, ax=ax)

    def plot_projection(self, *, ax=None):
        """Reference and surrogate states in 2-D (:func:`ergodex.plotting.plot_projection`)."""
        from ergodex.plotting import plot_projection

        return plot_projection(self, ax=ax)
