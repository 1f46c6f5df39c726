"""leadline.client: the typed client and the ``leadline`` command line.

A monitoring job, a labeling vendor and a release gate each need a few lines::

    from leadline.client import Client

    with Client("leadline.internal:50051", token=token) as client:
        client.ingest("fraud-scores", ids, features, probabilities, segments=regions)
        for a in client.acquire("fraud-scores", 20, labeler="vendor-a"):
            ...
        result = client.check_gate("fraud-scores", max_risk=0.05, confidence=0.95)
        if result.verdict is Verdict.PASS:
            ...

Public surface: :class:`Client`, :class:`TlsConfig`, :class:`Skip`,
:class:`IngestResult`, :class:`LocalServer`, the results :class:`Estimate` and
:class:`GateResult` with their enums :class:`Verdict`, :class:`EstimatorMode` and
:class:`BoundKind`, the exceptions (all subclasses of :class:`LeadlineError`), and
:func:`pool_name`. Reports and CSV export live in ``leadline.client.report`` and
``leadline.client.export``.
"""

import os

# gRPC's C core writes INFO lines to stderr on its own (e.g. each failed TLS handshake);
# the client's exceptions already say what happened. Set before grpc is first imported;
# an explicit GRPC_VERBOSITY in the environment wins.
os.environ.setdefault("GRPC_VERBOSITY", "ERROR")

from leadline.client._client import Client, IngestResult, Skip, pool_name  # noqa: E402
from leadline.client._errors import (  # noqa: E402
    AccessDenied,
    AlreadyExists,
    Conflict,
    DeadlineExceeded,
    InvalidRequest,
    LeadlineError,
    NotFound,
    Overloaded,
    PartiallyAccepted,
    Unavailable,
)
from leadline.client._local_server import LocalServer  # noqa: E402
from leadline.client._results import (  # noqa: E402
    BoundKind,
    Estimate,
    EstimatorMode,
    GateResult,
    Verdict,
)
from leadline.client._tls import TlsConfig  # noqa: E402

__all__ = [
    "AccessDenied",
    "AlreadyExists",
    "BoundKind",
    "Client",
    "Conflict",
    "DeadlineExceeded",
    "Estimate",
    "EstimatorMode",
    "GateResult",
    "IngestResult",
    "InvalidRequest",
    "LeadlineError",
    "LocalServer",
    "NotFound",
    "Overloaded",
    "PartiallyAccepted",
    "Skip",
    "TlsConfig",
    "Unavailable",
    "Verdict",
    "pool_name",
]
