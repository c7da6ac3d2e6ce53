"""How a fit runs: each engine turns an input into a core Bundle (dask_engine: on a Dask cluster)."""
