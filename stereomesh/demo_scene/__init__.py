"""Render the demo scene: a synthetic, calibrated, rectified stereo pair with ground truth.

The scene is invented for this package: a weathered stone doorway with a carved
lintel, set in a rough plastered wall.  A smooth painted plaque on the wall is a
deliberately low-texture patch and a granite pillar standing in front of the wall
is a deliberate occluder (wall that the left camera sees beside the pillar is
hidden from the right camera).

Every surface is textured by value noise evaluated on *world* coordinates, so both
cameras see the same texture.  Each pixel is ray-cast against the scene (2 x 2
supersamples, Lambertian shading from one fixed light, no cast shadows); the ground
truth (depth, disparity, occlusion, a mesh) comes from the same ray-caster at the
left pixel centres, so it agrees with the images to well under a millimetre.

Run ``python -m stereomesh.demo_scene --out demo_data [--width W] [--view oblique]``;
``--view oblique`` renders the same scene from the rig turned 25 degrees about
the vertical (the wall recedes, disparities slope across the image, the
pillar's curved face is seen from the side), with the same ground-truth files.
It is not committed: benchmarks and tests render it on demand (about 6 s).

Modules: ``scene`` (layout, textures, ray-caster), ``render`` (the views and
their ground truth), ``files`` (writing the demo folder, the command line).

Geometry, metres, left camera frame (x right, y down, z forward):

* wall: height field ``Z = 3.5 + undulation + plaster roughness``;
* door opening ``|X| <= 0.42, Y >= -0.50``, its wooden door set back at ``Z = 3.85``;
* stone surround 4 cm proud of the wall: jambs to ``|X| <= 0.58`` below the
  lintel, lintel ``|X| <= 0.66, -0.86 <= Y < -0.50`` with a sunken panel of carved
  rosettes up to about 4 cm high;
* painted plaque ``-1.16 <= X <= -0.80, -0.42 <= Y <= 0.04``, 8 mm proud and smooth;
* pillar: vertical cylinder of radius 0.12 with its axis at ``X = 0.75, Z = 2.30``.

The wall, surround, door and plaque form one height field whose pieces are smooth,
so each piece is solved by Newton's method along the ray, and whose steps between
pieces are vertical faces found where the ray crosses a piece's edge.  The pillar
is intersected analytically.
"""

from stereomesh.demo_scene.files import DEMO_FILES, demo_disparity_range, main, write_demo_scene
from stereomesh.demo_scene.render import OBLIQUE_ANGLE, VIEWS, render_demo_scene

__all__ = ["DEMO_FILES", "OBLIQUE_ANGLE", "VIEWS", "demo_disparity_range", "main",
           "render_demo_scene", "write_demo_scene"]
