"""The one exception tree of benchrun.

Every error the tool raises on purpose derives from :class:`BenchrunError`. Third-party
exceptions (pyvisa, h5py, SQLAlchemy, pyhanko, OS errors) are translated at the module
boundary with ``raise ... from exc`` so callers only ever catch this tree::

    BenchrunError
    ├── ConfigError                 bad sequence / bench / limits file (names file:line and field)
    │   └── UnitError               a quantity that does not parse or has the wrong dimension
    ├── AnalysisError               a capture that cannot be analysed at all
    │   ├── InputDataError          bad arrays or CSV: NaN, non-monotonic time, too short, ...
    │   └── NoEventError            no recovery event found in the record
    ├── InstrumentError             anything that went wrong talking to an instrument
    │   ├── InstrumentTimeout       no answer within the timeout
    │   ├── ConnectionLost          the session dropped; one reconnect is attempted
    │   ├── ProtocolError           malformed answer (garbled block header, truncated block ...)
    │   ├── InstrumentReportedError the instrument's SCPI error queue was not empty
    │   └── CalibrationOverdue      calibration date passed and no override given
    ├── SafetyError                 a setting refused by the pre-flight check, or unsafe state
    ├── RunError                    the runner could not go on (interlock, resume mismatch ...)
    ├── StoreError                  raw record or results database problem
    ├── GradingError                limits cannot be applied to the results
    ├── ReportError                 rendering or signing failed
    └── VerificationError           verification could not be carried out (not: "did not pass")

A device that fails its limits is a *result*, never an exception; a verification that finds
tampering returns a negative verdict, it does not raise.
"""

from __future__ import annotations


class BenchrunError(Exception):
    """Root of every error benchrun raises on purpose."""


class ConfigError(BenchrunError):
    """A configuration file or value is wrong.

    Parameters
    ----------
    message
        What is wrong.
    file, line, field
        Where, when known; rendered as ``file:line: field: message``.
    """

    def __init__(
        self,
        message: str,
        *,
        file: str | None = None,
        line: int | None = None,
        field: str | None = None,
    ) -> None:
        self.message = message
        self.file = file
        self.line = line
        self.field = field
        super().__init__(self.__str__())

    def __str__(self) -> str:
        where = ""
        if self.file:
            where = f"{self.file}:{self.line}: " if self.line else f"{self.file}: "
        what = f"{self.field}: " if self.field else ""
        return f"{where}{what}{self.message}"


class UnitError(ConfigError):
    """A quantity that does not parse, or has the wrong dimension."""


class AnalysisError(BenchrunError):
    """A capture that cannot be analysed at all."""


class InputDataError(AnalysisError):
    """Input arrays or files that are unusable (NaN, non-monotonic time, too short ...)."""


class NoEventError(AnalysisError):
    """No recovery event was found in the record."""


class InstrumentError(BenchrunError):
    """Something went wrong talking to an instrument."""


class InstrumentTimeout(InstrumentError):
    """The instrument did not answer within the timeout."""


class ConnectionLost(InstrumentError):
    """The session to the instrument dropped."""


class ProtocolError(InstrumentError):
    """A malformed answer: garbled block header, truncated block, unparsable number."""


class InstrumentReportedError(InstrumentError):
    """The instrument's SCPI error queue held entries after a command sequence."""


class CalibrationOverdue(InstrumentError):
    """An instrument is past its calibration due date and no override was given."""


class SafetyError(BenchrunError):
    """A setting refused by the pre-flight check, or a failure to reach the safe state."""


class RunError(BenchrunError):
    """The runner cannot go on."""


class StoreError(BenchrunError):
    """Raw record or results database problem."""


class StoreUnavailable(StoreError):
    """The results database server cannot be reached (connection refused or lost); the same
    write may succeed once it is back."""


class GradingError(BenchrunError):
    """Limits cannot be applied to the results."""


class ReportError(BenchrunError):
    """Rendering or signing a report failed."""


class VerificationError(BenchrunError):
    """Verification could not be carried out at all (a failed check is a result instead)."""


#: Tail third-party messages carry that means nothing to a user of the tool (SQLAlchemy adds
#: "(Background on this error at: https://sqlalche.me/...)" to every message).
_NOISE_MARKERS = ("(Background on this error at:", "\n[SQL:", "\n[parameters:")


def user_message(exc: BaseException) -> str:
    """One line for a person: the message of ``exc`` without library boilerplate."""
    text = str(exc)
    for marker in _NOISE_MARKERS:
        cut = text.find(marker)
        if cut >= 0:
            text = text[:cut]
    lines = [line.rstrip() for line in text.strip().splitlines() if line.strip()]
    return "\n".join(lines) if lines else type(exc).__name__
