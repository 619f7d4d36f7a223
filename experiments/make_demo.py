"""Generate the demo data of a fictional greenhouse growers' co-operative (invented data).

Writes, next to this script:
  bays.csv           weekly records of 24 glasshouse bays over 104 weeks (2,496 rows), with
                     the yield and whether a fungal outbreak was recorded
  heating-trial.csv  a 60-row trial of day-temperature set points in one bay
  bays-next-week.csv the 24 bays' planned climate for week 105, without outcomes: new rows to
                     predict (every row of bays.csv belongs to some partition, and a run's
                     sealed test rows are not predicted uncounted)

Deterministic: a splitmix64 generator of our own (not `random`, whose algorithms may change),
Box-Muller normals, and every value rounded to 2-3 decimals when written, so the bytes do not
depend on the platform's last-bit libm differences. Python 3 standard library only:
    python3 experiments/make_demo.py

The true relation (so a user can see what a good model should find):
  yield_kg = variety base (aurora 3.0, brisa 3.4, cobalt 2.8)
           + 0.09 * light
           - 0.012 * (temp_day - 24)^2
           - 0.02 * (temp_night - 17)^2
           + 0.35 * ln(co2 / 400)
           - 0.015 * |humidity - 75|
           + 0.06 * sqrt(irrigation)
           + bay effect (normal, sd 0.25, fixed per bay)
           + noise (normal, sd 0.35)
  heating trial: yield_kg = 4.0 - 0.02 * (temp_day - 24)^2 + noise (sd 0.25)
  outbreak (a fungal outbreak in the bay that week): "yes" with probability
           1 / (1 + exp(-(-2.2 + 0.22 (humidity - 75) - 0.35 (temp_night - 16.5) + 0.5 [brisa]))),
           drawn from its own stream
About 1% of humidity cells are blank (sensor outages).
"""

import math
import os

HERE = os.path.dirname(os.path.abspath(__file__))


class SplitMix:
    def __init__(self, seed):
        self.state = seed & 0xFFFFFFFFFFFFFFFF

    def u64(self):
        self.state = (self.state + 0x9E3779B97F4A7C15) & 0xFFFFFFFFFFFFFFFF
        z = self.state
        z = ((z ^ (z >> 30)) * 0xBF58476D1CE4E5B9) & 0xFFFFFFFFFFFFFFFF
        z = ((z ^ (z >> 27)) * 0x94D049BB133111EB) & 0xFFFFFFFFFFFFFFFF
        return z ^ (z >> 31)

    def uniform(self):
        return (self.u64() >> 11) / float(1 << 53)

    def normal(self):
        u1 = max(self.uniform(), 1e-300)
        u2 = self.uniform()
        return math.sqrt(-2.0 * math.log(u1)) * math.cos(2.0 * math.pi * u2)


def bays(rng, outbreak_rng):
    varieties = ["aurora", "brisa", "cobalt"]
    base = {"aurora": 3.0, "brisa": 3.4, "cobalt": 2.8}
    bay_names = [f"B{i:02d}" for i in range(1, 25)]
    bay_variety = {b: varieties[i % 3] for i, b in enumerate(bay_names)}
    bay_effect = {b: 0.25 * rng.normal() for b in bay_names}
    rows = []
    for week in range(1, 105):
        season = math.sin(2.0 * math.pi * (week - 10) / 52.0)
        for b in bay_names:
            light = 21.0 + 9.0 * season + 2.5 * rng.normal()
            temp_day = 23.0 + 2.5 * season + 1.6 * rng.normal()
            temp_night = 16.5 + 1.5 * season + 1.0 * rng.normal()
            co2 = 420.0 + 380.0 * rng.uniform()
            humidity = 74.0 + 6.0 * rng.normal()
            irrigation = 18.0 + 6.0 * season + 2.0 * rng.normal()
            irrigation = max(irrigation, 2.0)
            v = bay_variety[b]
            y = (base[v] + 0.09 * light - 0.012 * (temp_day - 24.0) ** 2 - 0.02 * (temp_night - 17.0) ** 2
                 + 0.35 * math.log(co2 / 400.0) - 0.015 * abs(humidity - 75.0) + 0.06 * math.sqrt(irrigation)
                 + bay_effect[b] + 0.35 * rng.normal())
            hum_text = f"{humidity:.1f}" if rng.uniform() >= 0.01 else ""
            # A separate stream, so adding this column left every other value as it was.
            logit = -2.2 + 0.22 * (humidity - 75.0) - 0.35 * (temp_night - 16.5) + (0.5 if v == "brisa" else 0.0)
            outbreak = "yes" if outbreak_rng.uniform() < 1.0 / (1.0 + math.exp(-logit)) else "no"
            rows.append([f"{b}-W{week:03d}", b, str(week), v, f"{light:.2f}", f"{temp_day:.2f}", f"{temp_night:.2f}",
                         f"{co2:.0f}", hum_text, f"{irrigation:.2f}", f"{y:.3f}", outbreak])
    header = ["record", "bay", "week", "variety", "light", "temp_day", "temp_night", "co2", "humidity", "irrigation", "yield_kg", "outbreak"]
    return header, rows


def next_week(rng):
    """Week 105's settings for every bay, from a stream of its own (bays.csv is unchanged)."""
    varieties = ["aurora", "brisa", "cobalt"]
    week = 105
    season = math.sin(2.0 * math.pi * (week - 10) / 52.0)
    rows = []
    for i in range(24):
        b = f"B{i + 1:02d}"
        light = 21.0 + 9.0 * season + 2.5 * rng.normal()
        temp_day = 23.0 + 2.5 * season + 1.6 * rng.normal()
        temp_night = 16.5 + 1.5 * season + 1.0 * rng.normal()
        co2 = 420.0 + 380.0 * rng.uniform()
        humidity = 74.0 + 6.0 * rng.normal()
        irrigation = max(18.0 + 6.0 * season + 2.0 * rng.normal(), 2.0)
        rows.append([f"{b}-W{week:03d}", b, str(week), varieties[i % 3], f"{light:.2f}", f"{temp_day:.2f}",
                     f"{temp_night:.2f}", f"{co2:.0f}", f"{humidity:.1f}", f"{irrigation:.2f}"])
    header = ["record", "bay", "week", "variety", "light", "temp_day", "temp_night", "co2", "humidity", "irrigation"]
    return header, rows


def trial(rng):
    rows = []
    for i in range(60):
        t = 16.0 + 14.0 * rng.uniform()
        y = 4.0 - 0.02 * (t - 24.0) ** 2 + 0.25 * rng.normal()
        rows.append([f"T{i + 1:02d}", f"{t:.2f}", f"{y:.3f}"])
    return ["plot", "temp_day", "yield_kg"], rows


def write(name, header, rows):
    with open(os.path.join(HERE, name), "w", newline="\n") as f:
        f.write(",".join(header) + "\n")
        for r in rows:
            f.write(",".join(r) + "\n")


if __name__ == "__main__":
    write("bays.csv", *bays(SplitMix(20261201), SplitMix(20261202)))
    write("heating-trial.csv", *trial(SplitMix(7)))
    write("bays-next-week.csv", *next_week(SplitMix(20261203)))
    print("wrote bays.csv, heating-trial.csv and bays-next-week.csv")
