"""Benchmarks: modules that print a table (``python -m hopwell.bench.<name>``)."""


def print_table(rows: dict, label: str, label_width: int, column_width: int, float_format: str = ".4g") -> None:
    """Print ``{row name: {column: value}}`` as aligned columns, floats in ``float_format``."""
    keys = list(next(iter(rows.values())))
    print(f"{label:<{label_width}} " + " ".join(f"{k:>{column_width}}" for k in keys))
    for name, row in rows.items():
        print(f"{name:<{label_width}} " + " ".join(
            f"{v:>{column_width}{float_format}}" if isinstance(v, float) else f"{v!s:>{column_width}}" for v in row.values()))
