"""The registry of surrogates: an SQLite index plus one folder per version.

:class:`Registry` (in :mod:`.core`) is the public face; its parts live in one module per job:
:mod:`.storage` (layout and file writes), :mod:`.names` (names and references), :mod:`.records`
(what callers receive), :mod:`.index` (SQLite schema, migrations, connections),
:mod:`.recovery`, :mod:`.registration`, :mod:`.queries`, :mod:`.status` and :mod:`.transfer`
(export and import).
"""

from ergodex import CAUTION
from ergodex.registry.core import Registry
from ergodex.registry.index import MIGRATIONS, SCHEMA_VERSION
from ergodex.registry.names import CURRENT, format_ref, parse_ref, split_ref, validate_name
from ergodex.registry.records import STATUSES, Event, ModelSummary, VersionInfo
from ergodex.registry.status import TRANSITIONS
from ergodex.registry.storage import (
    EXPORT_FORMAT,
    INDEX_FILE,
    OLD_EXPORT_FORMATS,
    OLD_RECORD_FORMATS,
    QUARANTINE_DIR,
    RECORD_FORMAT,
    STAGING_DIR,
    STATUS_FILE,
    STATUS_FORMAT,
    sha256_hex,
)

__all__ = [
    "CAUTION",
    "CURRENT",
    "EXPORT_FORMAT",
    "INDEX_FILE",
    "MIGRATIONS",
    "OLD_EXPORT_FORMATS",
    "OLD_RECORD_FORMATS",
    "QUARANTINE_DIR",
    "RECORD_FORMAT",
    "SCHEMA_VERSION",
    "STAGING_DIR",
    "STATUSES",
    "STATUS_FILE",
    "STATUS_FORMAT",
    "TRANSITIONS",
    "Event",
    "ModelSummary",
    "Registry",
    "VersionInfo",
    "format_ref",
    "parse_ref",
    "sha256_hex",
    "split_ref",
    "validate_name",
]
