from livequant.cli import main

raise SystemExit(main())
