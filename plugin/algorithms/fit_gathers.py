"""Processing algorithm: fit every shot gather of a survey."""

from __future__ import annotations

from qgis.core import QgsProcessing, QgsProcessingParameterFeatureSink

from .base import CoreCall, ReflectorAlgorithm, crs_from_pyproj, optional_number_parameter, progress_for, tr


class FitGathersAlgorithm(ReflectorAlgorithm):
    """Fit velocity, normal distance and traveltime dip per shot gather; place reflector points."""

    MIN_PICKS = "MIN_PICKS"
    REJECT_SIGMA = "REJECT_SIGMA"
    VELOCITY_MIN = "VELOCITY_MIN"
    VELOCITY_MAX = "VELOCITY_MAX"
    SHOTS = "SHOTS"
    POINTS = "REFLECTOR_POINTS"

    _name = "fitgathers"
    _display = "Fit shot gathers"
    _help = (
        "<p>Fits each picked shot gather with the exact image-source traveltime of a homogeneous "
        "layer over a plane (t² = x²/V² + 4hsx/V² + 4h²/V² on a straight flat line; Green 1938 for a "
        "horizontal reflector), robustly, with standard errors, and flags mispicks rather than "
        "dropping them silently.</p>"
        "<p><b>Input</b>: a survey.toml, or a picks table (line, shot, receiver, two-way time in ms, "
        "optional pick error in ms) with a stations point layer (line, station, ground elevation).</p>"
        "<p><b>Outputs</b>: <i>shots</i> (one point per gather at the shot: velocity_m_s, t0_ms, "
        "normal_distance_m, traveltime_dip_deg, rms_residual_ms, picks used/rejected, status, reason "
        "and standard errors) and <i>reflector points</i> (zero-offset reflection point of each "
        "gather: elevation_m, depth_m, sigma_m). The traveltime dip asin(s) is not the apparent dip of "
        "the line's section; true dip needs crossing lines (see Combine crossing lines).</p>"
        "<p>Empty settings keep the survey file's values.</p>"
    )

    def initAlgorithm(self, config=None):
        self.add_survey_parameters()
        self.addParameter(
            optional_number_parameter(self.MIN_PICKS, "Fewest usable picks to fit a gather", 3, 100000, integer=True)
        )
        self.addParameter(
            optional_number_parameter(
                self.REJECT_SIGMA, "Reject picks with |residual| above this many pick sigmas", 1.0, 1000.0
            )
        )
        self.addParameter(
            optional_number_parameter(self.VELOCITY_MIN, "Lowest plausible overburden velocity (m/s)", 50.0, 10000.0)
        )
        self.addParameter(
            optional_number_parameter(self.VELOCITY_MAX, "Highest plausible overburden velocity (m/s)", 50.0, 10000.0)
        )
        self.addParameter(
            QgsProcessingParameterFeatureSink(self.SHOTS, tr("Shots (fit per gather)"), QgsProcessing.TypeVectorPoint)
        )
        self.addParameter(
            QgsProcessingParameterFeatureSink(self.POINTS, tr("Reflector points"), QgsProcessing.TypeVectorPoint)
        )

    def processAlgorithm(self, parameters, context, feedback):
        overrides = {
            "min_picks": self.optional_number(parameters, self.MIN_PICKS, context),
            "reject_sigma": self.optional_number(parameters, self.REJECT_SIGMA, context),
            "velocity_min_m_s": self.optional_number(parameters, self.VELOCITY_MIN, context),
            "velocity_max_m_s": self.optional_number(parameters, self.VELOCITY_MAX, context),
        }
        if overrides["min_picks"] is not None:
            overrides["min_picks"] = int(overrides["min_picks"])
        survey = self.load_survey(parameters, context, feedback, overrides)
        from ...core import workflow
        from ...core.products import layers

        step = None
        with CoreCall(feedback) as call:
            step = workflow.fit_step(survey, progress_for(feedback))
        if call.cancelled or step is None:
            return {}
        crs = crs_from_pyproj(survey.crs)
        from .base import write_core_layer

        shots = write_core_layer(
            self, parameters, self.SHOTS, context, layers.shots_layer(step.gathers, step.fits), crs, feedback
        )
        points = write_core_layer(
            self, parameters, self.POINTS, context, layers.reflector_points_layer(step.points), crs, feedback
        )
        n_ok = int((step.fits.status == "ok").sum())
        feedback.pushInfo(tr("{n} gathers fitted, {ok} with status ok.").format(n=len(step.fits), ok=n_ok))
        return {self.SHOTS: shots, self.POINTS: points}
