from optreserve.cli.app import main

raise SystemExit(main())
