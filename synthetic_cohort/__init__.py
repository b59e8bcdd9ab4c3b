"""The invented demo registry: generator, its parameters and its known truth.

``write_synthetic(out_dir, persons=20000, seed=20261201, fmt="parquet")`` writes the extract,
the demo protocol with its code lists, and ``truth.json``; see ``synthetic_cohort/README.md``.
"""

__all__ = ["demo_protocol", "write_config", "write_synthetic"]


def __getattr__(name: str):
    # lazy, so `python -m synthetic_cohort.generate` does not import the module twice
    if name in __all__:
        from synthetic_cohort import generate

        return getattr(generate, name)
    raise AttributeError(name)
