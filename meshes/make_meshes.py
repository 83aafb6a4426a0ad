"""Regenerate the example files of this folder (our own invented scenarios).

    python meshes/make_meshes.py

* ``alder_lane_room2.msh`` — Room 2 of the (fictional) Alder Lane rehearsal
  house: five-sided floor, ceiling sloping 3.05 m -> 2.55 m, an open doorway;
  second-order tetrahedra sized for P2 up to 120 Hz.  Surfaces: floor,
  ceiling, front_wall, right_wall, angled_wall, back_wall, left_wall, doorway.
* ``mixing_room.toml`` — the demo scenario (Room 3 of the same house, a
  mixing room), a copy of ``acoustic_fem._demo.DEMO_SCENARIO`` and the fully
  commented example of the scenario format.
"""

from pathlib import Path

from acoustic_fem import write_mesh
from acoustic_fem._demo import DEMO_FILENAME, DEMO_SCENARIO, demo_room

HERE = Path(__file__).parent

if __name__ == "__main__":
    write_mesh(HERE / "alder_lane_room2.msh", demo_room(), overwrite=True)
    print("wrote", HERE / "alder_lane_room2.msh")
    (HERE / DEMO_FILENAME).write_text(DEMO_SCENARIO, encoding="utf-8")
    print("wrote", HERE / DEMO_FILENAME)
