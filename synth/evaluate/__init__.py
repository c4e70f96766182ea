"""Exact, batched evaluation of candidate loops (see DESIGN.md, "The exact evaluator")."""

from .core import METRICS, EvalOptions, add_slack, certify_row, evaluate, evaluate_controllers, step_responses

__all__ = ["METRICS", "EvalOptions", "add_slack", "certify_row", "evaluate", "evaluate_controllers", "step_responses"]
