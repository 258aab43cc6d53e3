"""Writes the same table as the shard stage with pyarrow and reports MB/s.

Usage: pyarrow_write.py SHARD_DIR OUT_DIR. Reads SHARD_DIR/*.parquet (the tool's
shards: PNG bytes already encoded, so pyarrow does no image work), then times
pyarrow.parquet writing that table with the same settings: zstd at the
manifest's level, row groups of the manifest's size, no dictionary and no
statistics on `image`, a new file every target-size-mb. Reports the best of
REPEAT fresh writes (env, default 3), as the shard bench does, twice: as
pyarrow writes by default (no fsync), and with each file fsync'ed once closed,
as the shard stage does before its atomic rename.
"""
import json, os, shutil, sys, time
import pyarrow as pa, pyarrow.parquet as pq

run, out = sys.argv[1], sys.argv[2]
files = sorted(f for f in os.listdir(run) if f.endswith(".parquet"))
table = pa.concat_tables([pq.read_table(f"{run}/{f}") for f in files])
level = int(os.environ.get("ZSTD_LEVEL", "3"))
rows_per_group = int(os.environ.get("ROW_GROUP_ROWS", "1024"))
target = float(os.environ.get("TARGET_SIZE_MB", "256")) * 1e6
cols = [c for c in table.column_names if c != "image"]


def synced(path):
    fd = os.open(path, os.O_RDONLY)
    try:
        os.fsync(fd)
    finally:
        os.close(fd)


def write_once(sync):
    shutil.rmtree(out, ignore_errors=True)
    os.makedirs(out)
    t0 = time.perf_counter()
    i, w, path = 0, None, None
    for start in range(0, table.num_rows, rows_per_group):
        if w is None:
            path = f"{out}/part-{i:05d}.parquet"
            w = pq.ParquetWriter(path, table.schema, compression="zstd", compression_level=level,
                                 use_dictionary=cols, write_statistics=cols)
        w.write_table(table.slice(start, rows_per_group), row_group_size=rows_per_group)
        if os.path.getsize(path) >= target:
            w.close(); w = None; i += 1
            if sync:
                synced(path)
    if w is not None:
        w.close()
        if sync:
            synced(path)
    return time.perf_counter() - t0


repeat = max(1, int(os.environ.get("REPEAT", "3")))
for sync in (False, True):
    secs = min(write_once(sync) for _ in range(repeat))
    size = sum(os.path.getsize(f"{out}/{f}") for f in os.listdir(out))
    print("BENCH " + json.dumps({"what": "pyarrow" + (" + fsync" if sync else ""), "input": os.path.basename(run),
                                 "pyarrow": pa.__version__, "rows": table.num_rows, "runs": repeat,
                                 "bytes": size, "seconds": secs, "mb_per_s": size / 1e6 / secs}))
