"""Per-item errors are counted in full and a cut list says so; the Python client does not
let a partly refused submission look accepted."""

from __future__ import annotations

import grpc
import pytest

from leadline.client import Client, PartiallyAccepted
from leadline.v1 import leadline_pb2 as pb
from tests.service.helpers import TOKENS, Dataset, Harness, classification_pool, item_batch

_POOL = "pools/tumours"


def _prepared(harness: Harness, data: Dataset) -> list[pb.Assignment]:
    with harness.stubs() as stubs:
        stubs.call(stubs.pools.CreatePool, classification_pool("tumours", data))
        stubs.call(stubs.ingest.IngestItems, item_batch("tumours", data, range(len(data.ids))))
        response = stubs.call(
            stubs.labeling.AcquireItems,
            pb.AcquireItemsRequest(pool=_POOL, count=10, labeler="vendor"),
            who="labeler",
        )
    return list(response.assignments)


def test_five_kept_and_thirty_refused_are_reported_as_such(
    harness: Harness, cancer_pool: Dataset
) -> None:
    held = _prepared(harness, cancer_pool)
    unknown = [f"d{900 + i}-000000000000" for i in range(30)]
    labels = [pb.LabelSubmission(assignment_id=a.assignment_id, class_label=1) for a in held[:5]]
    labels += [pb.LabelSubmission(assignment_id=u, class_label=1) for u in unknown]
    with harness.stubs("labeler") as stubs:
        reply = stubs.call(
            stubs.labeling.SubmitLabels,
            pb.SubmitLabelsRequest(pool=_POOL, labeler="vendor", labels=labels),
        )
        # Before: accepted=5 and 20 errors, with nothing saying 10 more were refused.
        assert (reply.accepted, reply.rejected, len(reply.errors)) == (5, 30, 20)
        assert reply.errors_truncated
        released = stubs.call(
            stubs.labeling.ReleaseItems,
            pb.ReleaseItemsRequest(
                pool=_POOL,
                labeler="vendor",
                assignment_ids=[a.assignment_id for a in held[5:7]] + unknown,
            ),
        )
        assert (released.released, released.rejected, len(released.errors)) == (2, 30, 20)
        assert released.errors_truncated
        # Few enough to list them all: not truncated.
        few = stubs.call(
            stubs.labeling.SubmitLabels,
            pb.SubmitLabelsRequest(
                pool=_POOL,
                labeler="vendor",
                labels=[
                    pb.LabelSubmission(assignment_id=held[7].assignment_id, class_label=0),
                    pb.LabelSubmission(assignment_id=unknown[0], class_label=0),
                ],
            ),
        )
        assert (few.accepted, few.rejected, len(few.errors), few.errors_truncated) == (
            1,
            1,
            1,
            False,
        )
        # Nothing applied: the call fails with the first problem and says how many.
        with pytest.raises(grpc.RpcError) as caught:
            stubs.call(
                stubs.labeling.SubmitLabels,
                pb.SubmitLabelsRequest(
                    pool=_POOL,
                    labeler="vendor",
                    labels=[pb.LabelSubmission(assignment_id=u, class_label=0) for u in unknown],
                ),
            )
        assert caught.value.code() == grpc.StatusCode.NOT_FOUND
        assert "(and 29 more refused)" in caught.value.details()


def test_the_client_raises_when_not_every_label_was_accepted(
    harness: Harness, cancer_pool: Dataset
) -> None:
    held = _prepared(harness, cancer_pool)
    assert harness.server is not None
    with Client(f"127.0.0.1:{harness.server.port}", token=TOKENS["labeler"]) as client:
        answers: dict[str, int] = {a.assignment_id: 1 for a in held[:3]}
        answers.update({f"d{900 + i}-000000000000": 1 for i in range(25)})
        with pytest.raises(PartiallyAccepted) as caught:
            client.submit_labels("tumours", answers, labeler="vendor")
        response = caught.value.response
        assert (response.accepted, response.rejected, response.errors_truncated) == (3, 25, True)
        assert "3 labels kept, 25 refused (the first 20 are in response.errors)" in str(
            caught.value
        )
        # Opting in to partial results returns the reply instead.
        again = client.submit_labels(
            "tumours",
            {held[3].assignment_id: 0, "d999-000000000000": 0},
            labeler="vendor",
            allow_partial=True,
        )
        assert (again.accepted, again.rejected) == (1, 1)
        with pytest.raises(PartiallyAccepted, match="1 assignments kept, 1 refused"):
            client.release(
                "tumours", [held[4].assignment_id, "d999-000000000000"], labeler="vendor"
            )
        # All accepted: the plain reply.
        assert (
            client.submit_labels("tumours", {held[5].assignment_id: 0}, labeler="vendor").accepted
            == 1
        )
