"""cairn's exceptions, one tree. Every error cairn raises on purpose is a `CairnError`: the CLI prints
it as one line naming the bad value and exits 2; the HTTP layer answers it with a 4xx or 503.

CairnError                 base of everything cairn raises on purpose
 ├── SettingsError         a setting (CAIRN_* variable or `cairn serve` flag) the service cannot run with
 ├── InputDataError        a click log or prepared data set that cannot be used (names file, column, row)
 ├── ArtifactError         a model artifact that is missing, corrupt or of another format
 ├── StoreError            the session store failed or timed out
 │    ├── StoreWriteUnknownError  a write was sent but no answer came: it may or may not have landed
 │    └── ForeignStateError       the store answered a session's read with another session's state
 ├── StepError             ONNX Runtime failed running a model step
 ├── ModelNotReadyError    a request arrived before the first artifact was loaded
 ├── EventSinkError        the click event sink (CAIRN_EVENTS) cannot be opened, written or read
 ├── ExperimentError       an experiment declaration (CAIRN_EXPERIMENT) or event log that cannot be used
 ├── ScenarioError         a demo-scenario parameter that cannot be used (offline/demo)
 ├── TrainingError         training settings that cannot work together, or a run that diverged (offline/model)
 ├── EvaluateOptionError   a `cairn evaluate` option with a value that cannot be used (offline/evaluate)
 ├── LoadTestError         a load test that cannot be set up or run (loadtest)
 └── BenchError            a benchmark that cannot run as asked (bench)

The classes live here, not beside the code that raises them, so `service` (which never imports the
offline workbench, the load test or the benchmarks) and the CLI share one tree; a test checks that
this docstring names every subclass.
"""


class CairnError(Exception):
    """Base class: the CLI prints these as one line and exits non-zero, never a traceback."""


class SettingsError(CairnError):
    """A setting with a value the service cannot run with."""


class InputDataError(CairnError):
    """A click log or prepared data set that cannot be used."""


class ArtifactError(CairnError):
    """A model artifact that is missing, corrupt or of another format."""


class StoreError(CairnError):
    """The session store failed or timed out."""


class StoreWriteUnknownError(StoreError):
    """A write was sent to the session store but its answer did not come within the request's
    budget (or the connection broke while waiting): the store may or may not hold it."""


class ForeignStateError(StoreError):
    """The value read for a session names another session as its owner (service.store.state): a
    store failure, never served as this visit's clicks nor overwritten."""


class StepError(CairnError):
    """ONNX Runtime could not run a step (wrong dtype or shape, item index out of range)."""


class ModelNotReadyError(CairnError):
    """A request arrived before the service loaded its first artifact."""


class EventSinkError(CairnError):
    """The click event sink cannot be opened, written or read (names the folder or redacted URL)."""


class ExperimentError(CairnError):
    """An experiment declaration or an event log the experiment tools cannot use (names file, field, value)."""


class ScenarioError(CairnError):
    """A demo-scenario parameter that cannot be used (names the parameter and its value)."""


class TrainingError(CairnError):
    """Training settings that cannot work together, or a run that diverged."""


class EvaluateOptionError(CairnError):
    """A `cairn evaluate` option with a value that cannot be used."""


class LoadTestError(CairnError):
    """A load test that cannot be set up or run: a bad flag value, a service that does not start,
    a load generator that fails. Names the bad value or the process and its last log lines."""


class BenchError(CairnError):
    """The benchmark cannot run as asked (a bad option, a missing tool, a server that did not start)."""
