"""Synthetic networks drawn from a release (post-processing; the one sampler of the project).

:func:`sample_network` draws from a release's public tables; the audit draws from the
true aggregate through the same functions (:func:`inputs_from_truth`, :func:`draw_network`).
"""

from __future__ import annotations

__all__ = ["sample_block_network", "sample_degree_corrected", "SynthesisInputs", "inputs_from_release",
           "inputs_from_truth", "fit_affinity", "draw_network", "sample_network", "synthetic_people",
           "write_sample", "SAMPLERS"]

from .block_model import sample_block_network
from .degree_corrected import sample_degree_corrected
from .sampler import (SAMPLERS, SynthesisInputs, draw_network, fit_affinity, inputs_from_release, inputs_from_truth,
                      sample_network, synthetic_people, write_sample)
