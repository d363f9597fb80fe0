"""Pure numerical kernels of quakefolio: numpy in, numpy out; no file I/O, no pandas, no Prefect."""
