from stagewatch.cli import main

raise SystemExit(main())
