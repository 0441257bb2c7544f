#!/usr/bin/env python3
"""Write a large invented site and its simulator scenario for the load run.

Usage: python3 tools/load_site.py OUTDIR TANKS DEVICES PORT

OUTDIR/site.toml gets DEVICES Modbus devices (unit ids 1..DEVICES on one
simulator address 127.0.0.1:PORT) and TANKS upright tanks spread over them,
each with a level (u16, 4..20 mA counts) and a gauge pressure (f32) register,
polled every second. OUTDIR/scenario.toml starts every tank at a different
level with a little noise, and opens one leak, so the estimator runs too.
Everything here is invented.
"""
import os
import sys


def main():
    if len(sys.argv) != 5:
        sys.exit(__doc__)
    out, tanks, devices, port = sys.argv[1], int(sys.argv[2]), int(sys.argv[3]), int(sys.argv[4])
    if not (1 <= devices <= 247 and tanks >= devices):
        sys.exit("load_site.py: need 1..247 devices and at least one tank per device")
    os.makedirs(out, exist_ok=True)
    site = ['[site]', 'name = "Load test site (invented)"', '', '[web]', 'listen = "127.0.0.1:0"', '']
    for d in range(devices):
        site += [
            "[[device]]",
            f'id = "rtu-{d + 1:02}"',
            f'address = "127.0.0.1:{port}"',
            f"unit_id = {d + 1}",
            "poll_interval_ms = 1000",
            "request_timeout_ms = 500",
            "",
        ]
    scenario = ['site = "site.toml"', "seed = 7", ""]
    per_device = {}
    for t in range(tanks):
        d = t % devices
        slot = per_device.get(d, 0)
        per_device[d] = slot + 1
        tag = f"LT-{t + 1:04}"
        site += [
            "[[tank]]",
            f'id = "{tag}"',
            f'device = "rtu-{d + 1:02}"',
            'geometry = { shape = "vertical_cylinder", diameter_m = 8.0, height_m = 10.0 }',
            'substance = { name = "product", density_kg_m3 = 850.0, reportable_kg = [1000.0] }',
            f'level = {{ register = "input", address = {slot}, type = "u16", raw = [4000, 20000], range = [0.0, 10.0], unit = "m" }}',
            f'pressure = {{ register = "holding", address = {2 * slot}, type = "f32", range = [-10.0, 100.0], unit = "kPa", reference = "gauge" }}',
            "",
        ]
        scenario += [
            "[[tank]]",
            f'id = "{tag}"',
            f"initial_level_m = {2.0 + 7.0 * ((t * 37) % 100) / 100.0:.3f}",
            "headspace_kpa = 5.0",
            "level_noise_m = 0.001",
            "pressure_noise_pa = 20.0",
            "",
        ]
    scenario += [
        "[[event]]",
        "at_s = 5.0",
        'action = "leak_opens"',
        'tank = "LT-0001"',
        "diameter_mm = 25.0",
        "height_m = 0.2",
        "cd = 0.61",
        "",
    ]
    with open(os.path.join(out, "site.toml"), "w", encoding="utf-8") as f:
        f.write("\n".join(site))
    with open(os.path.join(out, "scenario.toml"), "w", encoding="utf-8") as f:
        f.write("\n".join(scenario))


if __name__ == "__main__":
    main()
