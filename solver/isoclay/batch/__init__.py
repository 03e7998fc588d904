"""isoclay batch: a scan library cleaned on Dask (plan, cluster, runner, item work, store, summary, contact sheet)."""
