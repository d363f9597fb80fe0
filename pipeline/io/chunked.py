"""Per-asset tables built chunk by chunk: written to Parquet without ever holding the whole table.

A table with several rows per asset (four damage states, ...) of a million buildings
would hold hundreds of megabytes if built at once.  A :class:`ChunkedTable` holds only
the recipe: a function that builds the rows of any set of assets (in asset order) from
small per-pair arrays.  :class:`quakefolio.pipeline.io.store.RunWriter` writes it one
chunk of assets at a time (one or more Parquet row groups per chunk: the table's content
is the same as if written at once), and a reader that needs a few assets' rows (the
report) builds just those with :meth:`ChunkedTable.rows_of`.
"""
from __future__ import annotations

from dataclasses import dataclass
from typing import Callable

import numpy as np
import pyarrow as pa

__all__ = ["ChunkedTable", "CHUNK_ASSETS"]

#: Assets per chunk when a chunked table is written (2**18 rows of a 4-state damage table, one Parquet row group;
#: at 10**6 buildings 2**17 assets gave a lower peak memory and a shorter run than 2**18, and 2**16 a peak lower
#: again and steadier, 1.50-1.51 GB against 1.48-1.60 GB on the flow path, in as much time within the noise).
CHUNK_ASSETS = 1 << 16


@dataclass(frozen=True)
class ChunkedTable:
    """A table whose rows are built per chunk of assets.

    Attributes
    ----------
    n_assets : int
        Assets of the run (exposure order).
    build : callable(ndarray of int) -> pyarrow.Table
        The rows of the given asset indices (increasing), in table order.
    num_rows : int
        Rows of the whole table.
    asset_id : pyarrow.StringArray
        Asset ids in exposure order (to find the indices of named assets).
    chunk : int
        Assets per chunk when the table is written.
    """

    n_assets: int
    build: Callable
    num_rows: int
    asset_id: pa.Array
    chunk: int = CHUNK_ASSETS

    @property
    def schema(self):
        """The table's Arrow schema (of an empty build)."""
        return self.build(np.zeros(0, dtype=np.int64)).schema

    def chunks(self):
        """The whole table as consecutive Arrow tables of at most :attr:`chunk` assets each.

        Yields
        ------
        pyarrow.Table
        """
        for start in range(0, self.n_assets, self.chunk):
            yield self.build(np.arange(start, min(start + self.chunk, self.n_assets), dtype=np.int64))

    def rows_of(self, asset_ids):
        """The rows of the named assets, in table (exposure) order; unknown ids are skipped.

        Parameters
        ----------
        asset_ids : sequence of str

        Returns
        -------
        pyarrow.Table
        """
        import pyarrow.compute as pc

        wanted = pa.array(list(asset_ids), type=pa.string())
        found = pc.is_in(self.asset_id, value_set=wanted)
        return self.build(np.flatnonzero(np.asarray(found.to_numpy(zero_copy_only=False), dtype=bool)))

    def to_table(self):
        """The whole table at once (for small runs and tests).

        Returns
        -------
        pyarrow.Table
        """
        return pa.concat_tables(list(self.chunks()) or [self.build(np.zeros(0, dtype=np.int64))])
