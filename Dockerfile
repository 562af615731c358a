FROM python:3.11-slim
WORKDIR /app
COPY pyproject.toml README.md ./
COPY server ./server
COPY web ./web
COPY rules ./rules
COPY demo_seed ./demo_seed
RUN pip install --no-cache-dir '.[postgres]'
RUN useradd --create-home tierwise
USER tierwise
EXPOSE 8000
CMD ["tierwise", "serve", "--host", "0.0.0.0", "--port", "8000"]
