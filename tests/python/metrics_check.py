"""Parse leaktally's /metrics with the Prometheus project's Python client.

    python metrics_check.py FILE

FILE holds the body of a /metrics response. It is parsed with
prometheus_client 0.26.0's text-format parser
(prometheus_client.parser.text_string_to_metric_families), an independent
implementation of the Prometheus text exposition format, which raises on a
malformed line. Prints one JSON document on stdout:

  version    the prometheus_client version that parsed it
  families   {name: {"type": .., "help": .., "samples": [{"name": ..,
             "labels": {..}, "value": ..}]}}; NaN and infinities as strings

Exit code 0 when the text parsed, 1 (with the parser's message on stderr)
when it did not.
"""

from __future__ import annotations

import json
import math
import sys
from importlib.metadata import version

from prometheus_client.parser import text_string_to_metric_families


def number(x: float) -> float | str:
    if math.isnan(x):
        return "NaN"
    if math.isinf(x):
        return "+Inf" if x > 0 else "-Inf"
    return x


def main() -> int:
    with open(sys.argv[1], encoding="utf-8") as f:
        text = f.read()
    families = {}
    try:
        for family in text_string_to_metric_families(text):
            families[family.name] = {
                "type": family.type,
                "help": family.documentation,
                "samples": [
                    {"name": s.name, "labels": dict(s.labels), "value": number(s.value)}
                    for s in family.samples
                ],
            }
    except Exception as e:  # the parser raises ValueError and others
        print(f"not valid Prometheus text format: {e!r}", file=sys.stderr)
        return 1
    json.dump({"version": version("prometheus-client"), "families": families}, sys.stdout)
    return 0


if __name__ == "__main__":
    sys.exit(main())
