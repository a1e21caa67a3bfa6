"""The results store: versioned runs (vintages) and dataset snapshots in DuckDB (or any SQLAlchemy
database), with numbered migrations and named queries.  This package owns all SQL of riskprem and
never prints.

Typical use::

    from panel.store import open_store, write_dataset, write_run, run_query

    with open_store(resolve_location(option)) as store:
        digest = write_dataset(store, panel, "sleeves")
        run_id = write_run(store, {"dataset_hash": digest, "kind": "fit", "settings": {...},
                                   "status": "converged"}, {"estimates": frame, ...})
"""

from panel.store.connection import DEFAULT_LOCATION, ENV_VAR, open_store, public_location, resolve_location
from panel.store.environment import backfill_key, json_ready, run_environment
from panel.store.errors import StoreError
from panel.store.handle import Store
from panel.store.migrate import head_version, schema_drift, store_info, upgrade
from panel.store.queries import QueryInfo, list_queries, run_query
from panel.store.reader import (dataset_layout, export_run, find_run, get_run, is_bayes, list_datasets,
                                list_runs, load_panel, resolve_dataset, run_estimates, run_tables)
from panel.store.schema import RESULT_ORDER
from panel.store.writer import RUN_FIELDS, from_fit, write_dataset, write_run

__all__ = [
    "DEFAULT_LOCATION", "ENV_VAR", "QueryInfo", "RESULT_ORDER", "RUN_FIELDS", "Store", "StoreError", "backfill_key",
    "dataset_layout", "export_run", "find_run", "from_fit", "get_run", "head_version", "is_bayes", "json_ready",
    "list_datasets", "list_queries", "list_runs", "load_panel", "open_store", "public_location",
    "resolve_dataset", "resolve_location", "run_environment", "run_estimates", "run_query", "run_tables",
    "schema_drift", "store_info", "upgrade", "write_dataset", "write_run",
]
