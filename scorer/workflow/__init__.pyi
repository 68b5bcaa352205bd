"""Public entry points of this package (read by lazy_loader.attach_stub and type checkers)."""

from . import detector as detector
from . import dose as dose
from . import headers as headers
from . import inputs as inputs
from . import results as results
from . import scoring as scoring
from . import simulated as simulated
from . import trials as trials

from .inputs import (
    EXAMPLE_LIMITS as EXAMPLE_LIMITS,
    LimenWarning as LimenWarning,
    human_factor_from_analysis as human_factor_from_analysis,
    image_content_hash as image_content_hash,
    load_conversion as load_conversion,
    load_defect_map as load_defect_map,
    load_image as load_image,
    load_layout as load_layout,
    load_limits as load_limits,
    load_mtf as load_mtf,
    read_kerma_csv as read_kerma_csv,
    resolve_human_factor as resolve_human_factor,
)
from .scoring import ImageFiles as ImageFiles, score_files as score_files
from .dose import (
    score_dose_series as score_dose_series,
    file_background_kerma_ugy as file_background_kerma_ugy,
    file_panel as file_panel,
    series_groups as series_groups,
)
from .detector import (
    DetectorMeasurement as DetectorMeasurement,
    measure_detector_files as measure_detector_files,
    load_images as load_images,
    beam_qualities as beam_qualities,
    q_for_beam as q_for_beam,
)
from .results import (
    load_detector_json as load_detector_json,
    load_dose_json as load_dose_json,
    load_scored_json as load_scored_json,
)
from .simulated import load_detector_model as load_detector_model, write_simulated as write_simulated
from .trials import load_trials as load_trials, load_model_table as load_model_table
from .headers import read_image_metadata as read_image_metadata, read_acquisition_extras as read_acquisition_extras

__all__ = [
    "detector",
    "dose",
    "headers",
    "inputs",
    "results",
    "scoring",
    "simulated",
    "trials",
    "EXAMPLE_LIMITS",
    "LimenWarning",
    "human_factor_from_analysis",
    "image_content_hash",
    "load_conversion",
    "load_defect_map",
    "load_image",
    "load_layout",
    "load_limits",
    "load_mtf",
    "read_kerma_csv",
    "resolve_human_factor",
    "ImageFiles",
    "score_files",
    "score_dose_series",
    "series_groups",
    "file_panel",
    "file_background_kerma_ugy",
    "DetectorMeasurement",
    "measure_detector_files",
    "load_images",
    "beam_qualities",
    "q_for_beam",
    "load_detector_json",
    "load_dose_json",
    "load_scored_json",
    "load_detector_model",
    "write_simulated",
    "read_image_metadata",
    "read_acquisition_extras",
    "load_trials",
    "load_model_table",
]
