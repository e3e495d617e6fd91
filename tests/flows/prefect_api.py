"""Reading back what a flow run left in the Prefect API (for the flow and CLI tests)."""

from __future__ import annotations


def artifacts_of(flow_run_id: str) -> dict[str, object]:
    """The artifacts of one flow run, by key, read back from the Prefect API."""
    from prefect.client.orchestration import get_client  # Prefect only where a test needs it
    from prefect.client.schemas.filters import ArtifactFilter, ArtifactFilterFlowRunId

    with get_client(sync_client=True) as client:
        found = client.read_artifacts(
            artifact_filter=ArtifactFilter(flow_run_id=ArtifactFilterFlowRunId(any_=[flow_run_id]))
        )
    return {a.key: a for a in found}
