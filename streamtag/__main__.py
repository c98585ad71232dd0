from streamtag.cli import main

raise SystemExit(main())
