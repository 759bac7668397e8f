"""logitfork: fork one model's next-token distribution into several decoding settings.

The package splits along one line: `decoding`, `engine`, `models`, `scenario`,
`record`, `transcript`, `metrics` and `sweep` hold the model and the math and import
neither Textual nor Rich (a test checks); `app` holds the Textual screens, which only
show and command.
"""

__version__ = "0.1.0"
