"""Geometry stages: disparity to points, point filtering, surfaces and mesh repair.

Every stage takes and returns the plain containers of :mod:`stereomesh.geometry.data`
(:class:`~stereomesh.geometry.data.PointCloud` and
:class:`~stereomesh.geometry.data.TriMesh`), so the per-point confidence and depth
uncertainty travel with the geometry from triangulation to the exported mesh.
Open3D and PyMeshLab are imported inside the functions that need them.
"""
