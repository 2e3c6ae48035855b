"""Entry point of a reader process of the streaming pass (see :mod:`coastmon.stream.readers`)."""

if __name__ == "__main__":
    from coastmon.stream.readers import serve

    serve()
