"""ReFeX recursive structural features (Henderson et al., KDD 2011).

Henderson, Gallagher, Li, Akoglu, Eliassi-Rad, Tong, Faloutsos, "It's who you know:
graph mining using recursive structural features", KDD 2011. The method:

1. *Base features* per node: local (degrees, strengths, event counts, reciprocity) and
   egonet features (edges inside the egonet and edges leaving it); :mod:`.graph`, with
   the triangle kernel in :mod:`.triangles`.
2. *Recursive features*: sums and means of existing features over a node's in-, out- and
   all neighbours, computed round after round; :mod:`.definitions` names them and
   evaluates them with the one neighbour aggregate of :mod:`.graph`.
3. *Vertical logarithmic binning* with fraction ``p``: the ``p`` fraction of nodes with
   the lowest values get bin 0, the lowest ``p`` fraction of the rest bin 1, and so on;
   :mod:`.binning`.
4. *Pruning*: features whose binned values agree within ``s`` on every node are joined in
   an agreement graph; of each connected component only the earliest feature is kept
   (:mod:`.pruning`). Discovery (:mod:`.discovery`) stops when a round keeps no new
   feature, or after ``max_rounds``.

:meth:`FeatureRecipe.discover` runs this on reference snapshots and freezes the outcome
(kept features and bin edges) so that :meth:`FeatureRecipe.transform` produces exactly the
same columns, binned on the same scale, for every later window (:mod:`.recipe`, with
its parameters checked in :mod:`.parameters`).
"""

from .binning import apply_bins, bin_dtype, bin_edges, max_bins
from .graph import AGGREGATES, BASE_FEATURES
from .pruning import prune_agreeing
from .recipe import FeatureRecipe, FeatureTable
from .triangles import triangles_per_node

__all__ = [
    "AGGREGATES",
    "BASE_FEATURES",
    "FeatureRecipe",
    "FeatureTable",
    "bin_edges",
    "apply_bins",
    "bin_dtype",
    "max_bins",
    "prune_agreeing",
    "triangles_per_node",
]
