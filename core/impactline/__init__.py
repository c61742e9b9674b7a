"""impactline: streaming, plugin-based analysis of single-entity electrochemistry recordings.

Where things live
-----------------
stages      the five stage kinds (reader, filter, detector, measure, classifier) and their contracts
params      typed parameter declarations and the one validator
units       quantities with SI prefixes ("20 kHz", "5 pA")
hookspecs   the pluggy hooks a plugin implements
registry    plugin discovery (entry points, local files) and stage lookup
pipeline    pipeline files (TOML): loading, validation, hashing
runner      the streaming runner: one file at a time, chunk by chunk, files in parallel
output      run folder: Parquet schemas with units, atomic writes, resume
physics     Faraday's law, materials, Stokes-Einstein, diffusion-limited collision rates
simulate    synthetic recordings with ground truth
noise       spectra, noise-model fit, input capacitance, detection limits
testing     conformance checks any plugin author can run on their stages
cli         the ``impactline`` command
"""

__version__ = "0.1.0"

from .errors import ImpactlineError, InputError, PipelineError, PluginError
from .hookspecs import hookimpl
from .output import read_events
from .params import Param, ParameterError
from .pipeline import Pipeline, check_pipeline, load_pipeline, parse_pipeline
from .runner import RunResult, process_recording, run
from .stages import (
    Classifier,
    Column,
    Detector,
    Event,
    EventWindow,
    FeatureExtractor,
    Filter,
    FilterInfo,
    Reader,
    Recording,
    Stage,
)
from .units import format_quantity, parse_quantity

__all__ = [
    "Classifier", "Column", "Detector", "Event", "EventWindow", "FeatureExtractor", "Filter", "FilterInfo",
    "ImpactlineError", "InputError", "Param", "ParameterError", "PipelineError", "PluginError", "Reader",
    "Recording", "Stage", "format_quantity", "hookimpl", "parse_quantity", "__version__",
    "Pipeline", "check_pipeline", "load_pipeline", "parse_pipeline", "RunResult", "process_recording", "run",
    "read_events",
]
