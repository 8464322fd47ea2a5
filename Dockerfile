# textsieve images. Targets:
#   serve (default)  the prediction service: serving extras only, no torch
#                    docker build -t textsieve:serve .
#   train            serve plus the training extras (PyTorch CPU build) for train/export
#                    docker build --target train -t textsieve:train .
#   cluster          serve plus Dask distributed and pyarrow: a scheduler or worker for `textsieve score --cluster`
#                    docker build --target cluster -t textsieve:cluster .
#                    --build-arg TORCH_INDEX_URL=...  where the CPU build of torch comes from
# Settings are environment variables (TEXTSIEVE_*, see README "Scaling out"); the
# container listens on port 8000 and runs as the unprivileged user `textsieve`.

ARG PYTHON_IMAGE=python:3.11-slim

# -- build: the project's wheel, and a venv holding it with the serving extras --------------
FROM ${PYTHON_IMAGE} AS build
ENV PIP_NO_CACHE_DIR=1 \
    PIP_DISABLE_PIP_VERSION_CHECK=1
WORKDIR /src
COPY pyproject.toml README.md ./
# Every dependency at the version the tests ran with (`make lock`); both images install with it.
COPY requirements/lock.txt requirements/lock.txt
COPY textsieve textsieve
COPY registry registry
COPY service service
COPY exporter exporter
RUN pip wheel --no-deps --wheel-dir /wheels .
# The venv is built where it will live, so its scripts' paths are right in the next stage.
RUN python -m venv /opt/textsieve \
 && /opt/textsieve/bin/pip install -c requirements/lock.txt "$(ls /wheels/textsieve-*.whl)[serve]"

# -- runtime: what both images share ------------------------------------------------------
FROM ${PYTHON_IMAGE} AS runtime
RUN groupadd --system --gid 10001 textsieve \
 && useradd --system --uid 10001 --gid textsieve --home-dir /var/lib/textsieve --shell /usr/sbin/nologin textsieve \
 && mkdir -p /var/lib/textsieve/blobs /var/lib/textsieve/registry \
 && chown -R textsieve:textsieve /var/lib/textsieve
COPY --from=build /opt/textsieve /opt/textsieve
# TEXTSIEVE_HOST: inside its own network namespace the service must listen on every
# interface to be reachable from other containers; publish the port on the host with care.
# TEXTSIEVE_REGISTRY: a folder registry in /var/lib/textsieve/registry unless compose points
# it at PostgreSQL; TEXTSIEVE_BLOBS is the blob folder replicas share in that case.
ENV PATH=/opt/textsieve/bin:$PATH \
    PYTHONUNBUFFERED=1 \
    PYTHONDONTWRITEBYTECODE=1 \
    TEXTSIEVE_HOST=0.0.0.0 \
    TEXTSIEVE_PORT=8000 \
    TEXTSIEVE_REGISTRY=/var/lib/textsieve/registry \
    TEXTSIEVE_BLOBS=/var/lib/textsieve/blobs
WORKDIR /var/lib/textsieve
USER textsieve
EXPOSE 8000
# Ready, not merely alive: `textsieve health` exits 0 only when /readyz says every served
# model is loaded and warmed, so a load balancer gated on it never gets a cold replica.
HEALTHCHECK --interval=10s --timeout=6s --start-period=60s --retries=3 \
    CMD ["textsieve", "health", "--url", "http://127.0.0.1:8000"]
CMD ["textsieve", "serve"]

# -- train: adds PyTorch (CPU build) and the training extras ------------------------------
FROM runtime AS train
# The CPU-only build of torch; the default index would bring a multi-GB CUDA build instead.
ARG TORCH_INDEX_URL=https://download.pytorch.org/whl/cpu
ENV PIP_NO_CACHE_DIR=1 \
    PIP_DISABLE_PIP_VERSION_CHECK=1
USER root
COPY --from=build /wheels /tmp/wheels
COPY --from=build /src/requirements/lock.txt /tmp/lock.txt
# Only torch comes from that index (--no-deps); its dependencies and the training extras then
# come from PyPI at the locked versions, with the torch just installed satisfying the lock's pin.
RUN pip install --no-deps --index-url "${TORCH_INDEX_URL}" "torch==2.13.0+cpu" \
 && pip install -c /tmp/lock.txt "$(ls /tmp/wheels/textsieve-*.whl)[train]" \
 && rm -rf /tmp/wheels /tmp/lock.txt
USER textsieve
# Training and export are jobs that end, not a service to probe.
HEALTHCHECK NONE
CMD ["textsieve", "--help"]

# -- cluster: a Dask scheduler or worker that scores partitions (README "Scoring on a Dask cluster") --
FROM runtime AS cluster
ENV PIP_NO_CACHE_DIR=1 \
    PIP_DISABLE_PIP_VERSION_CHECK=1
USER root
COPY --from=build /wheels /tmp/wheels
COPY --from=build /src/requirements/lock.txt /tmp/lock.txt
RUN pip install -c /tmp/lock.txt "$(ls /tmp/wheels/textsieve-*.whl)[serve,cluster]" \
 && rm -rf /tmp/wheels /tmp/lock.txt
USER textsieve
# Dask's own processes; compose.yaml (profile "cluster") names the scheduler or worker command.
HEALTHCHECK NONE
EXPOSE 8786
CMD ["dask", "scheduler"]

# -- serve: the default target ------------------------------------------------------------
FROM runtime AS serve
