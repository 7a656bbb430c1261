"""The lineshape of a fit's model at parameter values, and its exact derivatives.

Where the model can be prepared (:class:`dnmr.engine.prepared.PreparedModel`: every block on a dense route)
the parameter values go straight into the model's numbers and the prepared block Liouvillians, without a
:class:`~dnmr.model.Model` built and checked for every evaluation; values the model would refuse, and models
that are not prepared, take the full route (:meth:`dnmr.fitting.parameters.ParameterLayout.model_from`), which
raises the model's own :class:`~dnmr.errors.InputError`.  Both routes give the same spectrum to rounding error.
"""
from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np

from dnmr.engine.blocks import lineshape_terms
from dnmr.engine.derivatives import (
    LineshapeDerivatives,
    ModelState,
    combined_numbers,
    coupling_direction,
    lineshape_derivatives,
)
from dnmr.engine.prepared import ModelNumbers, PreparedModel
from dnmr.engine.resolvent import LineshapeTerms
from dnmr.engine.spinsystems import coupling_array
from dnmr.fitting.parameters import ParameterLayout

PREPARE_MODELS = True
"""Evaluate through a prepared model where there is one (False builds a Model every time, as before: for
comparisons)."""


class FitLineshape:
    """The spectrum of a fit's model (its :class:`~dnmr.fitting.parameters.ParameterLayout`) at parameter values."""

    def __init__(self, layout: ParameterLayout):
        self.layout = layout
        model = layout.model
        self.prepared = PreparedModel.build(model) if PREPARE_MODELS else None
        self.couplings = coupling_array(model)
        self.coupling_places = [(c, coupling_direction(model, c, key)[2:], name)
                                for c, names in enumerate(layout.coupling_names) for name, key in names.items()]

    def numbers(self, values: Mapping[str, float]) -> ModelNumbers:
        """The model's numbers at parameter `values` (shifts in Hz, couplings, linewidths, populations, rates)."""
        layout, model = self.layout, self.layout.model
        sf = model.spectrometer.frequency_mhz
        couplings = self.couplings.copy()
        for c, (a, b), name in self.coupling_places:
            couplings[c, a, b] = couplings[c, b, a] = values[name]
        if layout.population_names:
            weights = np.array([float(values[n]) for n in layout.population_names])
            populations = weights / weights.sum()
        else:
            populations = model.populations()
        return ModelNumbers(np.array([[float(values[n]) * sf for n in names] for names in layout.shift_names]),
                            couplings, np.array([float(values[n]) for n in layout.linewidth_names]), populations,
                            np.array([10.0 ** float(values[n]) for n in layout.rate_names]))

    def _prepared_numbers(self, values: Mapping[str, float]) -> ModelNumbers | None:
        """The numbers at `values` where the prepared model takes them, else None."""
        if self.prepared is None:
            return None
        numbers = self.numbers(values)
        return numbers if self.prepared.accepts(numbers) else None

    def terms(self, values: Mapping[str, float]) -> LineshapeTerms:
        """The decomposition of the spectrum at parameter `values` (:func:`dnmr.engine.blocks.lineshape_terms`)."""
        numbers = self._prepared_numbers(values)
        if numbers is None:
            return lineshape_terms(self.layout.model_from(values))
        return self.prepared.terms(numbers)

    def derivatives(self, values: Mapping[str, float], hz: np.ndarray, along: Sequence[Mapping[tuple, float]]
                    ) -> LineshapeDerivatives:
        """The spectrum at parameter `values` and frequencies `hz` (Hz) with its derivatives along combinations of
        directions (:func:`dnmr.engine.derivatives.lineshape_derivatives`)."""
        numbers = self._prepared_numbers(values)
        if numbers is None:
            return lineshape_derivatives(self.layout.model_from(values), hz, along)
        weights = [float(values[n]) for n in self.layout.population_names]
        state = ModelState(numbers.populations, numbers.rates_per_s, sum(weights) if weights else 1.0)
        changes = [combined_numbers(self.layout.model, dict(c), self.prepared.jumps, state) for c in along]
        return self.prepared.derivatives(numbers, hz, changes, along)
