"""Annuity Factor Service: life-annuity factors under named, versioned, approved bases."""


def __getattr__(name):
    # Imported lazily so that ``service.engine`` can be used without Flask installed.
    if name == "create_app":
        from service.app import create_app

        return create_app
    raise AttributeError(name)
