"""One module per `logitfork` command: `add_arguments(parser)` and `main(args)`; light imports only."""
