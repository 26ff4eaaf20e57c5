"""Re-export of the user-facing error family (defined in the bottom package)."""
from estimators.core import (  # noqa: F401
    DataError,
    InfeasibleError,
    NoiseproofError,
    SettingsError,
    SingularCovarianceError,
)
