"""The Processing algorithms of the ``rockhead`` provider."""


def all_algorithms():
    """One new instance of each algorithm."""
    from .combine_lines import CombineLinesAlgorithm
    from .design_level import DesignLevelAlgorithm
    from .fit_gathers import FitGathersAlgorithm
    from .interpolate_surface import InterpolateSurfaceAlgorithm
    from .map_sheet import MapSheetAlgorithm
    from .run_survey import RunSurveyAlgorithm
    from .section_alignment import SectionAlongAlignmentAlgorithm

    return [
        FitGathersAlgorithm(),
        CombineLinesAlgorithm(),
        InterpolateSurfaceAlgorithm(),
        RunSurveyAlgorithm(),
        MapSheetAlgorithm(),
        SectionAlongAlignmentAlgorithm(),
        DesignLevelAlgorithm(),
    ]
