"""Independent reader check: load a COMTRADE record with the PyPI `comtrade` package.

stdin:  {"paths": [".cfg or .cff path", ...]}  (a .cfg's .dat is the one beside it)
stdout: {"records": [one per path: {"station", "device", "rev_year", "ft", "analog_ids",
         "analog_phases", "analog_units", "status_ids", "analog": [[value or null]], "status": [[0/1]], "time": [s],
         "trigger_time": s, "frequency": Hz, "total_samples": n}]}

Reference library: comtrade (PyPI, IEEE C37.111 reader), `Comtrade().load(cfg, dat)`.
Missing samples (NaN) are sent as null because JSON has no NaN.
"""

import json
import math
import sys

import comtrade


def clean(values):
    return [None if (isinstance(v, float) and math.isnan(v)) else float(v) for v in values]


def read(path):
    record = comtrade.Comtrade(use_double_precision=True, ignore_warnings=True)
    record.load(path)
    cfg = record.cfg
    answer = {
        "station": record.station_name,
        "device": record.rec_dev_id,
        "rev_year": record.rev_year,
        "ft": cfg.ft,
        "analog_ids": list(record.analog_channel_ids),
        "analog_phases": list(record.analog_phases),
        "analog_units": [channel.uu for channel in cfg.analog_channels],
        "status_ids": list(record.status_channel_ids),
        "analog": [clean(channel) for channel in record.analog],
        "status": [[int(v) for v in channel] for channel in record.status],
        "time": [float(t) for t in record.time],
        "trigger_time": float(record.trigger_time),
        "frequency": float(record.frequency),
        "total_samples": int(record.total_samples),
    }
    return answer


def main():
    request = json.load(sys.stdin)
    json.dump({"records": [read(path) for path in request["paths"]]}, sys.stdout)


if __name__ == "__main__":
    main()
