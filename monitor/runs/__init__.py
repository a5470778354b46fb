"""Runs: from samples to filter steps (``live``), the one run model (``run``: where runs
begin, a run stepped and summed up), replay, drift across runs and the run verdict, and
reading any log as runs (``logs``). Builds on records, estimation and physics."""
