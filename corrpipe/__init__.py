from corrpipe.version import __version__
