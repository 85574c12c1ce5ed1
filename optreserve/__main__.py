from optreserve.cli import main

raise SystemExit(main())
