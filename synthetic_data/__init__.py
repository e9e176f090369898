"""Demo data for the blood gas audit: an invented hospital whose records obey physiology.

``generate()`` builds canonical records and a ground-truth table of injected faults;
``write_exports()`` writes them as the demo site exports (US-style CSV, European-style CSV,
Parquet). ``python -m synthetic_data --help`` runs both. All names, patients and numbers are
invented (Saltmarsh Valley Hospital does not exist).
"""

from synthetic_data.faults import DEFAULT_FAULT_RATES, FAULT_TYPES, scale_fault_rates
from synthetic_data.generator import generate

__all__ = ["DEFAULT_FAULT_RATES", "FAULT_TYPES", "generate", "scale_fault_rates"]
