from benchseq.cli import main

raise SystemExit(main())
