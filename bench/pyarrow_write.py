"""Writes the same table as the shard stage with pyarrow and reports MB/s.

Usage: pyarrow_write.py SHARD_DIR OUT_DIR. Reads SHARD_DIR/*.parquet (the tool's
shards: PNG bytes already encoded, so pyarrow does no image work), then times
pyarrow.parquet writing that table with the same settings: zstd at the
manifest's level, row groups of the manifest's size, no dictionary and no
statistics on `image`, a new file every target-size-mb. Reports the best of
REPEAT fresh writes (env, default 3), as the shard bench does, twice: as
pyarrow writes by default (no fsync), and with each file fsync'ed once closed,
as the shard stage does before its atomic rename.

When the shards hold PNG images, a third figure puts pyarrow on the shard
stage's footing: the frames are decoded to raw RGB first (not timed), then the
timed write PNG-encodes them with Pillow (zlib level 1, its fastest; 2 threads,
as the stage uses) before pyarrow writes the table ("pyarrow + Pillow PNG").
Its PNGs are larger than the stage's (zlib with Pillow's filter choice against
fast deflate with Paeth), so compare it by rows/s, which every line reports.
"""
import io, json, os, shutil, sys, time
from concurrent.futures import ThreadPoolExecutor
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


def write_once(sync, table=table):
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
                                 "bytes": size, "seconds": secs, "mb_per_s": size / 1e6 / secs,
                                 "rows_per_s": table.num_rows / secs}))


def png_encoded(frames, size):
    def one(raw):
        buf = io.BytesIO()
        Image.frombuffer("RGB", size, raw, "raw", "RGB", 0, 1).save(buf, "PNG", compress_level=1)
        return buf.getvalue()

    with ThreadPoolExecutor(2) as pool:
        return list(pool.map(one, frames))


images = table.column("image").to_pylist()
if images and images[0][:8] == b"\x89PNG\r\n\x1a\n":
    from PIL import Image  # also used by png_encoded

    frame_size = Image.open(io.BytesIO(images[0])).size
    frames = [Image.open(io.BytesIO(b)).convert("RGB").tobytes() for b in images]
    at = table.column_names.index("image")

    def encode_then_write():
        t0 = time.perf_counter()
        encoded = pa.array(png_encoded(frames, frame_size), type=table.schema.field("image").type)
        with_png = table.set_column(at, table.schema.field("image"), encoded)
        return time.perf_counter() - t0 + write_once(False, with_png)

    secs = min(encode_then_write() for _ in range(repeat))
    size_bytes = sum(os.path.getsize(f"{out}/{f}") for f in os.listdir(out))
    print("BENCH " + json.dumps({"what": "pyarrow + Pillow PNG", "input": os.path.basename(run),
                                 "pyarrow": pa.__version__, "rows": table.num_rows, "runs": repeat,
                                 "bytes": size_bytes, "seconds": secs, "mb_per_s": size_bytes / 1e6 / secs,
                                 "rows_per_s": table.num_rows / secs}))
