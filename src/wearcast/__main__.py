from wearcast.cli.main import main

if __name__ == "__main__":  # pragma: no cover - thin shim
    main()
