from stereomesh.cli import entry

raise SystemExit(entry())
