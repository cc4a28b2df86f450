from liftpool.cli import main

raise SystemExit(main())
