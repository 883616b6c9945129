# expertloop application image (app server and worker share it).
FROM python:3.11-slim

ENV PYTHONDONTWRITEBYTECODE=1 PYTHONUNBUFFERED=1 PIP_DISABLE_PIP_VERSION_CHECK=1
WORKDIR /srv/expertloop
COPY pyproject.toml README.md ./
COPY app ./app
COPY migrations ./migrations
COPY templates ./templates
COPY static ./static
COPY demo_data ./demo_data
# a plain install: templates, static files, migrations and demo data ship inside the package
RUN pip install --no-cache-dir . && rm -rf /srv/expertloop/*
RUN useradd --create-home expertloop && mkdir -p /data && chown expertloop /data
USER expertloop
ENV EXPERTLOOP_DATA_DIR=/data
EXPOSE 8000
CMD ["expertloop", "serve", "--host", "0.0.0.0", "--port", "8000"]
