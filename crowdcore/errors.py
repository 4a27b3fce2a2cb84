"""One exception family, so hosts can catch crowdcore errors without catching everything."""


class CrowdError(Exception):
    """Base of every error crowdcore raises on bad input."""


class ScenarioError(CrowdError, ValueError):
    """A scenario file or definition is invalid; the message names the key path."""


class TrajectoryError(CrowdError, ValueError):
    """A trajectory file is invalid; the message names the file and line."""


class RecordSetError(CrowdError, ValueError):
    """A motion-record set file is invalid or inconsistent."""


class SnapshotError(CrowdError, ValueError):
    """A snapshot or recording is corrupt, of another version, or inconsistent."""


class StepError(CrowdError, ValueError):
    """A step or command was called with bad arguments; the world is unchanged."""
