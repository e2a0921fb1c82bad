"""Stage 4, publish: top-N predictions, the version folder (staged, renamed, live pointer switched
atomically), its manifest, and scoring of any pairs with a published version."""
