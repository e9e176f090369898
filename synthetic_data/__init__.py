"""Demo data for the blood gas audit: an invented hospital whose records obey physiology.

``generate()`` builds canonical records and a ground-truth table of injected faults;
``generate_demo()`` adds the truth table of clinical look-alikes (real patients whose
physiology looks odd but is not an error), the oxygen prescriptions feed with its gaps
(``prescribing.py``) and the oxygen truth of each sample (staff titrate oxygen towards the target
in force, ``titration.py``); ``write_exports()`` writes them as the demo site
exports (US-style CSV, European-style CSV, Parquet). ``python -m synthetic_data --help`` runs
both. All names, patients and numbers are invented (Saltmarsh Valley Hospital does not exist).
The physics is the generator's own (``physics.py``), independent of the pipeline's SQL macros.
"""

from synthetic_data.faults import DEFAULT_FAULT_RATES, FAULT_TYPES, scale_fault_rates
from synthetic_data.generator import DemoData, generate, generate_demo
from synthetic_data.lookalikes import DEFAULT_LOOKALIKE_RATES, LOOKALIKE_KINDS

GENERATOR_VERSION = "4"
"""Changes when the same rows and seed would give other data (the demo regenerates its exports)."""

__all__ = [
    "DEFAULT_FAULT_RATES",
    "DEFAULT_LOOKALIKE_RATES",
    "FAULT_TYPES",
    "GENERATOR_VERSION",
    "LOOKALIKE_KINDS",
    "DemoData",
    "generate",
    "generate_demo",
    "scale_fault_rates",
]
