"""Split strategies -> concrete regions and counts; footprint geometry; guard bands; proofs."""

from .guarantees import Verdict
from .planner import Plan, SplitPlan, canvas_of, make_plan

__all__ = ["Plan", "SplitPlan", "Verdict", "canvas_of", "make_plan"]
