from seamscan.cli import main

raise SystemExit(main())
