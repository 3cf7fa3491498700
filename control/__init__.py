"""stimsteer.control: from predictors to stimulation plans, closed loops, benchmarks and reports."""

__all__: list[str] = []
