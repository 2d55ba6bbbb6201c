"""Regenerate the demo campaign in this folder (fictional data, known answers).

The scenario and its parameters are in ``diffkit/demo.py``: the invented
"ardenite" family of lithium-containing hosts, three candidates at four
temperatures, written by diffkit's known-answer generators in three real file
formats with run cards. Nothing here is real data.

Run:  python sample_trajectories/regenerate.py [--out FOLDER]
"""

import argparse
import os

from diffkit.demo import regenerate


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--out", default=os.path.dirname(os.path.abspath(__file__)))
    args = p.parse_args(argv)
    print(regenerate(args.out))


if __name__ == "__main__":
    main()
