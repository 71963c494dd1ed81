from microsim.cli import main

raise SystemExit(main())
