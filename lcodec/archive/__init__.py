"""The archive layer: one pipeline for every frame kind.

    plan    inputs become an archive's frames, of a kind (plan.py)
    code    any runner codes any frame: this process, --jobs, --cluster (runners.py)
    write   records in order, streaming; --resume (write.py); --per-file (perfile.py)
    read    decode_stream, unpack (read.py); verify, info (verify.py); salvage (salvage.py)

It knows frame kinds only through frames/ (a work item in, a record out), models only
through the model protocol and the registry, and the container only through format/.
"""
