"""Prefect flows: orchestration only; every task is a thin call into ``pipeline``."""
