"""Where registration batches run: in this process, a local process pool or a Dask cluster, behind one protocol."""
