"""Provider metadata: the ``apache_airflow_provider`` entry point, so Airflow lists counterbid."""

from __future__ import annotations

from importlib import metadata

__all__ = ["get_provider_info"]


def _version() -> str:
    try:
        return metadata.version("counterbid")
    except metadata.PackageNotFoundError:  # running from a source tree that is not installed
        return "0+unknown"


def get_provider_info() -> dict:
    """Provider information in the shape of Airflow's ``provider_info.schema.json``."""
    return {
        "package-name": "counterbid",
        "name": "counterbid",
        "description": "Per-arm revenue and welfare estimates of auction-rule experiments, over DuckDB.",
        "versions": [_version()],
        "integrations": [
            {"integration-name": "counterbid", "external-doc-url": "https://pypi.org/project/counterbid/", "tags": ["software"]}
        ],
        "operators": [{"integration-name": "counterbid", "python-modules": ["counterbid.operators.pipeline"]}],
        "hooks": [{"integration-name": "counterbid", "python-modules": ["counterbid.operators.hooks"]}],
        "connection-types": [
            {"connection-type": "counterbid_duckdb", "hook-class-name": "counterbid.operators.hooks.ResultsHook"}
        ],
    }
