"""Monte Carlo studies: designs with known truth, the study replicate, the resumable runner and
its summaries; and the built-in demo scenario."""

from stackdr.studies._demo import DESCRIPTION, TRUE_EFFECT, simulate_demo
from stackdr.studies._design_library import kang_schafer_transform
from stackdr.studies._design_registry import get_design, list_designs, register_design
from stackdr.studies._designs import Design, DesignData
from stackdr.studies._replicate import (
    ORACLE,
    STUDY_SETTINGS,
    build_libraries,
    check_settings,
    make_replicate,
    oracle_row,
    simulate_replicate,
)
from stackdr.studies._runner import ReplicateError, replicate_seeds, run_study
from stackdr.studies._store import (
    StudyCodeError,
    StudyExistsError,
    StudySettingsError,
    code_fingerprint,
    read_study_record,
)
from stackdr.studies._summaries import (
    MixedCodeWarning,
    paired_differences,
    read_results,
    summarise_study,
)

__all__ = [
    "code_fingerprint",
    "DESCRIPTION",
    "ORACLE",
    "STUDY_SETTINGS",
    "TRUE_EFFECT",
    "Design",
    "DesignData",
    "MixedCodeWarning",
    "ReplicateError",
    "StudyCodeError",
    "StudyExistsError",
    "StudySettingsError",
    "build_libraries",
    "check_settings",
    "get_design",
    "kang_schafer_transform",
    "list_designs",
    "make_replicate",
    "oracle_row",
    "paired_differences",
    "read_results",
    "read_study_record",
    "register_design",
    "replicate_seeds",
    "run_study",
    "simulate_demo",
    "simulate_replicate",
    "summarise_study",
]
