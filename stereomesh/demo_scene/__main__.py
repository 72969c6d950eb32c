"""``python -m stereomesh.demo_scene``: render the demo folder."""

from stereomesh.demo_scene.files import main

raise SystemExit(main())
