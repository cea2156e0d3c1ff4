"""The toy corpus: seeded logbooks of an invented archipelago, probe sets and a tokenizer.

Knows nothing of models or Hydra. Main entry points: ``get_corpus``, ``WindowBatches``,
``validation_windows``.
"""

from .batches import WindowBatches, document_starts, validation_windows
from .config import check_config
from .corpus import Corpus, cache_key, default_cache_dir, get_corpus
from .tokenizer import DOC_START_ID

__all__ = [
    "Corpus",
    "get_corpus",
    "WindowBatches",
    "validation_windows",
    "document_starts",
    "check_config",
    "cache_key",
    "default_cache_dir",
    "DOC_START_ID",
]
