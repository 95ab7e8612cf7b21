"""Beyond one machine: the Parquet event archive, window closes computed on a Dask cluster,
and per-window outputs as Parquet (docs/scale.md). Needs the optional extra ``[scale]``.
"""
