"""Running recognisers over pages: the serial engine, the run writer, the Dask engine, throughput measurement."""
