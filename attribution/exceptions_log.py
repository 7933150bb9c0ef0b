"""The exception ledger of one run: every rejected or suspicious input row, with its reason.

Rows are gathered as small column arrays and turned into one frame with the columns of
``input_exceptions`` (see :mod:`attribution.schema`) at the end of the run.
"""

from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

REJECTED = "rejected"
WARNING = "warning"
INFO = "info"  # nothing wrong: a record of what the job did to an input (a split's restatement)


COLUMNS = ("file", "key", "rule", "detail", "severity")  # the text columns of a ledger row, in order


@dataclass(frozen=True, slots=True)
class LedgerRows:
    """Rows added by one :meth:`ExceptionLog.add`, as arrays (the frame is made once, by :meth:`ExceptionLog.frame`)."""

    file: str
    key: np.ndarray     # object array of texts
    rule: str
    detail: np.ndarray  # object array of texts
    severity: str
    keyless: np.ndarray  # bool

    def __len__(self) -> int:
        return len(self.key)


@dataclass(slots=True)
class ExceptionLog:
    """Collects exception rows; ``add`` takes arrays so callers never loop per row."""

    as_of: dt.date
    _parts: list[LedgerRows] = field(default_factory=list)

    def add(self, file: str, keys: object, rule: str, detail: object, severity: str = REJECTED,
            keyless: object = False) -> None:
        """One row per key; ``detail`` is one text for all or one per key.

        ``keyless`` (one flag for all or one per key) marks rows whose file row has no key: their
        key text names the row's number in the file. The flag, not the text, says so, because a
        real key may read like that text.
        """
        key_array = np.asarray(keys, dtype=object).ravel()
        if key_array.size == 0:
            return
        if not all(type(k) is str for k in key_array):  # null keys and other values shown as text
            key_array = pd.Series(key_array, dtype=object).fillna("(null)").astype(str).to_numpy(dtype=object)
        details = np.broadcast_to(np.asarray(detail, dtype=object), key_array.shape)
        self._parts.append(LedgerRows(
            file=file, key=key_array, rule=rule, detail=details.astype(str).astype(object), severity=severity,
            keyless=np.broadcast_to(np.asarray(keyless, dtype=bool), key_array.shape)))

    def mark(self) -> int:
        """A place in the ledger, for :meth:`since`."""
        return len(self._parts)

    def since(self, mark: int) -> tuple[LedgerRows, ...]:
        """The rows added after ``mark`` (blocks to :meth:`extend` another ledger with)."""
        return tuple(self._parts[mark:])

    def extend(self, parts: tuple[LedgerRows, ...]) -> None:
        """Add rows taken with :meth:`since` from a ledger of the same date's files, in their order."""
        self._parts.extend(parts)

    def frame(self, keyless: bool = False) -> pd.DataFrame:
        """All rows so far, with ``as_of``, in the order they were found (and the ``keyless`` flag if asked)."""
        columns = ["as_of", *COLUMNS, *(["keyless"] if keyless else [])]
        if not self._parts:
            return pd.DataFrame({c: np.empty(0, dtype=bool if c == "keyless" else object) for c in columns})
        sizes = [len(part) for part in self._parts]
        data: dict[str, object] = {"as_of": pd.Timestamp(self.as_of)}
        for name in ("file", "rule", "severity"):  # one text per part
            data[name] = np.repeat(np.array([getattr(part, name) for part in self._parts], dtype=object), sizes)
        for name in ("key", "detail"):
            data[name] = np.concatenate([getattr(part, name) for part in self._parts])
        if keyless:
            data["keyless"] = np.concatenate([part.keyless for part in self._parts])
        return pd.DataFrame({c: data[c] for c in columns})

    def count(self, severity: str) -> int:
        """How many rows of that severity."""
        return sum(len(part) for part in self._parts if part.severity == severity)
