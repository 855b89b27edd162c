"""Offline evaluation: full-ranking metrics, scorecards, paired comparisons; sharded over Dask workers."""

from xrec.evaluate._candidates import CandidateEvaluation, evaluate_candidates, top_n_items
from xrec.evaluate._chunked import evaluate_blend_chunked
from xrec.evaluate._metrics import ALL_METRICS, metrics_from_ranks
from xrec.evaluate._screen import evaluate_screened
from xrec.evaluate._ranking import UNRANKED, BlockRanks, count_at_least, rank_heldout, top_k_items
from xrec.evaluate.compare import Comparison, compare
from xrec.evaluate.evaluator import as_score_fn, evaluate, evaluate_blocks
from xrec.evaluate.protocols import FullRanking, SampledNegatives
from xrec.evaluate.scorecard import Scorecard
from xrec.evaluate.segments import segment_labels
from xrec.evaluate.sharded import evaluate_blend_sharded, evaluate_blocks_sharded, evaluate_sharded

__all__ = [
    "ALL_METRICS",
    "UNRANKED",
    "BlockRanks",
    "CandidateEvaluation",
    "Comparison",
    "FullRanking",
    "SampledNegatives",
    "Scorecard",
    "as_score_fn",
    "compare",
    "count_at_least",
    "evaluate",
    "evaluate_blend_chunked",
    "evaluate_blend_sharded",
    "evaluate_blocks",
    "evaluate_blocks_sharded",
    "evaluate_sharded",
    "evaluate_candidates",
    "evaluate_screened",
    "metrics_from_ranks",
    "rank_heldout",
    "segment_labels",
    "top_k_items",
    "top_n_items",
]
