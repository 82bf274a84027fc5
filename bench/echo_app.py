"""The floor of the single-factor HTTP figure: a minimal Flask app that answers a POSTed JSON
body with the same JSON, served by the same gunicorn configuration as the service.

    gunicorn -c service/serving/gunicorn.conf.py bench.echo_app:app
"""

from flask import Flask, jsonify, request

app = Flask(__name__)


@app.post("/")
def echo():
    return jsonify(request.get_json())
