"""A plugin module that fails to import, as a broken third-party package would."""

raise ImportError("this plugin needs a library that is not installed")
