from stereomesh.cli import main

raise SystemExit(main())
