"""diffkit: defensible diffusion numbers from MD of solid ion conductors.

Internal units: Å, ps, eV, K, elementary charge. Public names are re-exported
here; the modules behind them are implementation.
"""

from importlib.metadata import PackageNotFoundError, version as _version

from .errors import (DiffkitError, DiffkitWarning, FitError, InputError, UnitsError,
                     UsageError)
from .trajectory import Trajectory
from .io.assemble import read_trajectory
from .io.store import ingest, open_run
from .io.write import write_extxyz, write_lammps_dump, write_xdatcar
from .arrhenius import ArrheniusFit, ArrheniusPoint, fit_arrhenius
from .msd import ChargeMSDCurve, MSDCurve, compute_charge_msd, compute_msd
from .diffusion import (ChargeTransportEstimate, DiffusionEstimate, choose_fit_window,
                        estimate_charge_transport, estimate_diffusion)
from .hops import HOP_METHODS, HopSummary, SiteCensus, count_hops
from .trust import (VERDICTS, CheckResult, RunAssessment, TrustThresholds, assess_run,
                    expected_relative_error, kinetic_temperature_K, poisson_upper_limit)
from .planning import (HE_2018_PRECISION, SYNTHETIC_PRECISION, CampaignPlan,
                       ExtrapolationPrecision, PlannedRun, PrecisionModel,
                       default_precision_model, extrapolation_precision, plan_campaign)
from .campaign import CampaignResult, RunOutcome, campaign_status, run_campaign
from .synth import (CampaignTruth, GroundTruth, SyntheticRun, arrhenius_campaign, hopping_run,
                    vacancy_kmc_run, write_run)
from .conductivity import (CAUTIONS, CandidateSummary, Conductivity, ConductivityTiers,
                           collective_conductivity, default_charge, extrapolate_conductivity,
                           nernst_einstein, nernst_einstein_from_internal,
                           sigma_from_charge_msd_slope, summarize_candidate, volume_at)

try:
    __version__ = _version("diffkit")
except PackageNotFoundError:  # pragma: no cover - running from a source tree
    __version__ = "0.0.0+unknown"

__all__ = [
    "__version__",
    "DiffkitError", "DiffkitWarning", "FitError", "InputError", "UnitsError", "UsageError",
    "Trajectory", "read_trajectory", "open_run", "ingest",
    "write_extxyz", "write_lammps_dump", "write_xdatcar",
    "ArrheniusFit", "ArrheniusPoint", "fit_arrhenius",
    "CAUTIONS", "CandidateSummary", "Conductivity", "ConductivityTiers",
    "collective_conductivity", "default_charge", "extrapolate_conductivity", "nernst_einstein",
    "nernst_einstein_from_internal", "sigma_from_charge_msd_slope", "summarize_candidate",
    "volume_at",
    "ChargeMSDCurve", "MSDCurve", "compute_charge_msd", "compute_msd",
    "ChargeTransportEstimate", "DiffusionEstimate", "choose_fit_window",
    "estimate_charge_transport", "estimate_diffusion",
    "HOP_METHODS", "HopSummary", "SiteCensus", "count_hops",
    "VERDICTS", "CheckResult", "RunAssessment", "TrustThresholds", "assess_run",
    "expected_relative_error", "kinetic_temperature_K", "poisson_upper_limit",
    "HE_2018_PRECISION", "SYNTHETIC_PRECISION", "CampaignPlan", "ExtrapolationPrecision",
    "PlannedRun", "PrecisionModel", "default_precision_model", "extrapolation_precision",
    "plan_campaign",
    "CampaignResult", "RunOutcome", "campaign_status", "run_campaign",
    "CampaignTruth", "GroundTruth", "SyntheticRun", "arrhenius_campaign", "hopping_run",
    "vacancy_kmc_run", "write_run",
]
