"""``make demo``: the main job on the embedded default, SQLite.

Until the demo feed can be replayed it shows the physiology core on one invented blood
gas from the Hollowmere General Hospital scenario (1,600 m elevation).
"""

from __future__ import annotations

import sys

from monitor import cli


def main() -> int:
    print("gasgap demo: one blood gas at Hollowmere General Hospital (1,600 m)\n")
    return cli.main(
        ["calc", "--pao2", "58", "--paco2", "34", "--fio2", "0.40", "--elevation-m", "1600",
         "--age", "67", "--peep", "8", "--map", "14", "--spo2", "90"]
    )


if __name__ == "__main__":
    sys.exit(main())
