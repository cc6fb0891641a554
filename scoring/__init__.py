"""Scores out: SPD geometry, the kNN index, baselines and scores, the fleet step, evaluation (pure, no Prefect)."""
