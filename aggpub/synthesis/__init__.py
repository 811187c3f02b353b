"""Synthetic networks drawn from a release (post-processing; the one sampler of the project)."""

from __future__ import annotations

__all__ = ["sample_block_network", "sample_network", "synthetic_people", "write_sample"]

from .block_model import sample_block_network, sample_network, synthetic_people, write_sample
