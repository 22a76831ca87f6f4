from pixelfit.cli import main

raise SystemExit(main())
