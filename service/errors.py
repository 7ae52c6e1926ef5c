"""cairn's exceptions, one tree.

CairnError                 base of everything cairn raises on purpose
 ├── InputDataError        a click log or prepared data set that cannot be used (names file, column, row)
 ├── ArtifactError         a model artifact that is missing, corrupt or of another format
 ├── StoreError            the session store failed or timed out
 └── StepError             ONNX Runtime failed running a model step (service/runtime/onnx_step.py)
"""


class CairnError(Exception):
    """Base class: the CLI prints these as one line and exits non-zero, never a traceback."""


class InputDataError(CairnError):
    """A click log or prepared data set that cannot be used."""


class ArtifactError(CairnError):
    """A model artifact that is missing, corrupt or of another format."""


class StoreError(CairnError):
    """The session store failed or timed out."""
