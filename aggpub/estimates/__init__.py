"""Post-processing of released values (reads public tables only; costs no privacy budget).

* :mod:`aggpub.estimates.consistency` -- clamping, isotonic regression and consistent histograms.
* :mod:`aggpub.estimates.counts` -- non-negative superedge estimates with unbiased per-supernode and
  whole-table sums (the bundle's ``edge_count_estimate``).
* :mod:`aggpub.estimates.degrees` -- degree estimates from the noisy sorted degree sequences
  (``degree_estimate``).
* :mod:`aggpub.estimates.intervals` -- the exact law of sums of discrete Laplace noise, intervals
  for sums of cells, cut-query masks.
* :mod:`aggpub.estimates.supergraph` -- the release as a networkx graph of supernodes.
* :mod:`aggpub.estimates.views` -- true view tables (contacts between values of an attribute,
  optionally per layer), their sensitivities, one noisy release.
* :mod:`aggpub.estimates.matrix` -- consistent estimates by generalised least squares over the
  supernode table and the views, intervals, the contact matrix.
* :mod:`aggpub.estimates.release_matrix` -- the contact matrix of a bundle's view (``aggpub matrix``,
  ``aggpub.contact_matrix``) and its heat map.

The modules are imported where they are used (no eager imports here), so that a command
pays only for what it needs.
"""
