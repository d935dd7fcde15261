"""Run the command line as ``python -m curate``."""

if __name__ == "__main__":  # pragma: no cover - exercised through a subprocess test
    from curate.cli import main

    main()
