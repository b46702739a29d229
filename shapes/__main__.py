from shapes.cli import main

raise SystemExit(main())
