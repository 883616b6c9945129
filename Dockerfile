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
# editable install keeps migrations/, templates/ and static/ beside the package
RUN pip install --no-cache-dir -e .
RUN useradd --create-home expertloop && mkdir -p /data && chown expertloop /data
USER expertloop
ENV EXPERTLOOP_DATA_DIR=/data
EXPOSE 8000
CMD ["expertloop", "serve", "--host", "0.0.0.0", "--port", "8000"]
