from stereomesh.cli import entry

# Guarded: the batch runner's worker processes are started with "spawn", which
# imports the parent's main module (this one under ``python -m stereomesh``).
if __name__ == "__main__":
    raise SystemExit(entry())
