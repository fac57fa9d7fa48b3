"""The pure core: no sockets, files, threads or clock reads; time is a parameter."""
