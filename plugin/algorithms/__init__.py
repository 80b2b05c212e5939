"""The Processing algorithms of the ``rockhead`` provider."""


def all_algorithms():
    """One new instance of each algorithm."""
    from .combine_lines import CombineLinesAlgorithm
    from .fit_gathers import FitGathersAlgorithm
    from .interpolate_surface import InterpolateSurfaceAlgorithm
    from .run_survey import RunSurveyAlgorithm

    return [FitGathersAlgorithm(), CombineLinesAlgorithm(), InterpolateSurfaceAlgorithm(), RunSurveyAlgorithm()]
