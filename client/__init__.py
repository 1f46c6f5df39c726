"""leadline.client: the typed client and the ``leadline`` command line.

A monitoring job, a labeling vendor and a release gate each need a few lines::

    from leadline.client import Client

    with Client("leadline.internal:50051", token=token) as client:
        client.ingest("fraud-scores", ids, features, probabilities, segments=regions)
        for a in client.acquire("fraud-scores", 20, labeler="vendor-a"):
            ...
        result = client.check_gate("fraud-scores", max_risk=0.05, confidence=0.95)

Public surface: :class:`Client`, :class:`TlsConfig`, :class:`Skip`,
:class:`IngestResult`, :class:`LocalServer`, the exceptions (all subclasses of
:class:`LeadlineError`), and :func:`pool_name`. Reports and CSV export live in
``leadline.client.report`` and ``leadline.client.export``.
"""

from leadline.client._client import Client, IngestResult, Skip, pool_name
from leadline.client._errors import (
    AccessDenied,
    AlreadyExists,
    Conflict,
    InvalidRequest,
    LeadlineError,
    NotFound,
    Overloaded,
    Unavailable,
)
from leadline.client._local_server import LocalServer
from leadline.client._tls import TlsConfig

__all__ = [
    "AccessDenied",
    "AlreadyExists",
    "Client",
    "Conflict",
    "IngestResult",
    "InvalidRequest",
    "LeadlineError",
    "LocalServer",
    "NotFound",
    "Overloaded",
    "Skip",
    "TlsConfig",
    "Unavailable",
    "pool_name",
]
