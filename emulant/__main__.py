from emulant.cli import main

raise SystemExit(main())
