"""Processing algorithm: combine crossing lines into true dip and strike."""

from __future__ import annotations

from qgis.core import QgsProcessing, QgsProcessingParameterFeatureSink, QgsProcessingParameterNumber

from .base import (
    CoreCall,
    ReflectorAlgorithm,
    crs_from_pyproj,
    optional_number_parameter,
    progress_for,
    tr,
    write_core_layer,
)


def combine_survey(survey, radius_m, min_angle_deg, progress):
    """Fit the gathers, then measure the dip at every line crossing (core.workflow fit_step + dips_step)."""
    from dataclasses import replace

    from ...core import workflow
    from ...core.progress import SubProgress

    settings = replace(survey.settings, combine_radius_m=radius_m, min_line_angle_deg=min_angle_deg)
    survey = replace(survey, settings=settings)
    step = workflow.fit_step(survey, SubProgress(progress, 0, 60))
    dips, _ = workflow.dips_step(survey, step, SubProgress(progress, 60, 100))
    progress.set_progress(100)
    return step, dips


class CombineLinesAlgorithm(ReflectorAlgorithm):
    """True dip and strike from gathers of lines of different directions near one another."""

    RADIUS = "RADIUS"
    MIN_ANGLE = "MIN_ANGLE"
    OUTPUT = "DIP_MEASUREMENTS"

    _name = "combinelines"
    _display = "Combine crossing lines (true dip and strike)"
    _help = (
        "<p>A straight line sees only the along-line part of the reflector's dip (its fitted "
        "s = sin(dip)·cos(angle between line and dip direction)). Where gathers of at least two "
        "well-separated line directions lie close together, a weighted least-squares solution for the "
        "horizontal part of the reflector normal gives the true dip, dip direction and strike "
        "(right-hand rule: dip direction = strike + 90°) with their standard errors. At every crossing of "
        "two lines, the gathers within the search radius of the crossing are used (so the dip is that of the "
        "crossing, not of whole lines), refitted with the cross-line dip the crossing resolves until it "
        "settles (on sloping ground the first fits, made with no cross-line dip, are biased). Crossings whose "
        "line directions are nearly parallel are flagged (no dip) rather than guessed.</p>"
        "<p><b>Input</b>: a survey.toml, or a picks table with a stations point layer.</p>"
        "<p><b>Output</b>: <i>dip measurements</i> (dip_deg, dip_direction_deg, strike_deg, "
        "sigma_dip_deg, lines, status).</p>"
        "<p>Empty radius: half the median spread length.</p>"
    )

    def initAlgorithm(self, config=None):
        self.add_survey_parameters()
        self.addParameter(optional_number_parameter(self.RADIUS, "Search radius around each crossing (m)", 0.1, 1.0e6))
        self.addParameter(
            QgsProcessingParameterNumber(
                self.MIN_ANGLE,
                tr("Least angle between line directions (degrees)"),
                type=QgsProcessingParameterNumber.Double,
                defaultValue=30.0,
                minValue=5.0,
                maxValue=90.0,
            )
        )
        self.addParameter(
            QgsProcessingParameterFeatureSink(self.OUTPUT, tr("Dip measurements"), QgsProcessing.TypeVectorPoint)
        )

    def processAlgorithm(self, parameters, context, feedback):
        from ...core.products import layers

        survey = self.load_survey(parameters, context, feedback)
        radius = self.optional_number(parameters, self.RADIUS, context)
        angle = self.parameterAsDouble(parameters, self.MIN_ANGLE, context)
        dips = None
        with CoreCall(feedback) as call:
            _step, dips = combine_survey(survey, radius, angle, progress_for(feedback))
        if call.cancelled or dips is None:
            return {}
        dest = write_core_layer(
            self, parameters, self.OUTPUT, context, layers.dips_layer(dips), crs_from_pyproj(survey.crs), feedback
        )
        return {self.OUTPUT: dest}
