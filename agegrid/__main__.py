from agegrid.cli import main

raise SystemExit(main())
