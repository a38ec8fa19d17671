from causeline.cli import main

raise SystemExit(main())
