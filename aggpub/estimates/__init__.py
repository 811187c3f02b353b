"""Post-processing estimates: contact matrices from views and the supernode table.

* :mod:`aggpub.estimates.views` -- true view tables (contacts between values of
  an attribute, optionally per layer), their sensitivities, one noisy release.
* :mod:`aggpub.estimates.matrix` -- consistent estimates by generalised least
  squares over the supernode table and the views, intervals, the contact matrix.
"""

from .matrix import (ConsistentEstimate, FineTable, ViewRelease, consistent_estimates, contact_matrix,
                     contact_matrix_square, possible_values_from_labels, possible_values_from_people)
from .views import (clip_weights, combine_codes, one_layer_per_contact, release_view, true_view_table,
                    view_cell_count, view_cells, view_sensitivity, view_table)

__all__ = ["ConsistentEstimate", "FineTable", "ViewRelease", "consistent_estimates", "contact_matrix",
           "contact_matrix_square", "possible_values_from_labels", "possible_values_from_people",
           "clip_weights", "combine_codes", "one_layer_per_contact", "release_view", "true_view_table",
           "view_cell_count", "view_cells", "view_sensitivity", "view_table"]
