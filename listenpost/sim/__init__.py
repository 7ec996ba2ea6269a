"""
The venue simulator: a scenario file in, per-board recordings, a btsnoop capture and the ground truth out.

    scenario.py   YAML → validated frozen dataclasses
    venue.py      rooms, walls and floor slabs crossed, door paths
    visitors.py   visitor flow → where each tag is when
    radio.py      log-distance path loss, walls, slabs, shadowing, hearing
    generate.py   the vectorised run and the files

``listenpost sim brackenford --minutes 10 --out DIR`` runs the shipped demo venue.
"""
