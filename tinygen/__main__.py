from tinygen.cli import main

raise SystemExit(main())
