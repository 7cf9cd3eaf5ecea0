"""Streams a recorded CSV (time_s,volts,amps,temp_c) to a gibbsline channel
as if it were being measured now; resumes after breaks.

    python3 stream_csv.py 127.0.0.1:50051 b3-vrb-1 cell.csv
"""

import csv
import sys
import time

from gibbsline_rig import GibbslineRig


def main(address: str, channel_id: str, path: str) -> None:
    rig = GibbslineRig(address, channel_id, batch_size=200)
    start_ns = time.time_ns()
    with open(path, newline="") as f:
        for row in csv.DictReader(f):
            rig.add(
                volts=float(row["volts"]),
                amps=float(row["amps"]) if row.get("amps") else None,
                temp_c=float(row["temp_c"]) if row.get("temp_c") else None,
                time_ns=start_ns + int(float(row["time_s"]) * 1e9),
            )
            if rig.pending >= 1000:
                rig.flush()
    print(f"stored up to seq {rig.flush()}; refused: {len(rig.refused)}")


if __name__ == "__main__":
    main(*sys.argv[1:4])
