//! A small HTTP/1.1 client for the console tests (requests with a body of
//! JSON, answers with a length or chunked), a reader of server-sent
//! events, and a checker of JSON against the OpenAPI file's schemas.

use serde_json::Value;
use std::collections::BTreeSet;
use tokio::io::{AsyncBufReadExt, AsyncRead, AsyncReadExt, AsyncWrite, AsyncWriteExt, BufReader};

/// One answer: status, headers (names in lower case), body.
#[derive(Debug)]
pub(crate) struct Answer {
    pub status: u16,
    pub headers: Vec<(String, String)>,
    pub body: Vec<u8>,
}

impl Answer {
    pub(crate) fn json(&self) -> Value {
        serde_json::from_slice(&self.body).unwrap_or_else(|e| {
            panic!("{e}: {}", String::from_utf8_lossy(&self.body));
        })
    }
    pub(crate) fn header(&self, name: &str) -> Option<&str> {
        self.headers
            .iter()
            .find(|(n, _)| n == name)
            .map(|(_, v)| v.as_str())
    }
}

/// Sends one request on a fresh connection and reads the whole answer.
pub(crate) async fn request(
    addr: std::net::SocketAddr,
    method: &str,
    path: &str,
    token: Option<&str>,
    body: Option<&Value>,
) -> Answer {
    let stream = tokio::net::TcpStream::connect(addr).await.unwrap();
    request_on(stream, method, path, token, body).await
}

/// [`request`] on a stream the caller opened (TLS, say).
pub(crate) async fn request_on(
    mut stream: impl AsyncRead + AsyncWrite + Unpin,
    method: &str,
    path: &str,
    token: Option<&str>,
    body: Option<&Value>,
) -> Answer {
    send_head(&mut stream, method, path, token, body).await;
    let mut reader = BufReader::new(stream);
    let (status, headers) = read_head(&mut reader).await;
    let chunked = headers
        .iter()
        .any(|(n, v)| n == "transfer-encoding" && v.contains("chunked"));
    let length = headers
        .iter()
        .find(|(n, _)| n == "content-length")
        .and_then(|(_, v)| v.parse::<usize>().ok());
    let body = if chunked {
        read_chunked(&mut reader).await
    } else if let Some(n) = length {
        // Some peers keep the connection open despite `close`.
        let mut b = vec![0; n];
        reader.read_exact(&mut b).await.unwrap();
        b
    } else {
        let mut b = Vec::new();
        reader.read_to_end(&mut b).await.unwrap();
        b
    };
    Answer {
        status,
        headers,
        body,
    }
}

async fn send_head(
    stream: &mut (impl AsyncWrite + Unpin),
    method: &str,
    path: &str,
    token: Option<&str>,
    body: Option<&Value>,
) {
    let body = body.map(|b| b.to_string()).unwrap_or_default();
    let mut head = format!("{method} {path} HTTP/1.1\r\nHost: 127.0.0.1\r\nConnection: close\r\n");
    if let Some(t) = token {
        head.push_str(&format!("Authorization: Bearer {t}\r\n"));
    }
    if !body.is_empty() || method == "POST" {
        head.push_str(&format!(
            "Content-Type: application/json\r\nContent-Length: {}\r\n",
            body.len()
        ));
    }
    head.push_str("\r\n");
    stream.write_all(head.as_bytes()).await.unwrap();
    stream.write_all(body.as_bytes()).await.unwrap();
    stream.flush().await.unwrap();
}

async fn read_head(reader: &mut (impl AsyncBufReadExt + Unpin)) -> (u16, Vec<(String, String)>) {
    let mut line = String::new();
    reader.read_line(&mut line).await.unwrap();
    let status = line
        .split_whitespace()
        .nth(1)
        .and_then(|s| s.parse().ok())
        .unwrap_or_else(|| panic!("status line {line:?}"));
    let mut headers = Vec::new();
    loop {
        line.clear();
        reader.read_line(&mut line).await.unwrap();
        let l = line.trim_end();
        if l.is_empty() {
            return (status, headers);
        }
        let (n, v) = l.split_once(':').unwrap();
        headers.push((n.trim().to_ascii_lowercase(), v.trim().to_string()));
    }
}

async fn read_chunked(reader: &mut (impl AsyncBufReadExt + Unpin)) -> Vec<u8> {
    let mut out = Vec::new();
    loop {
        let mut size = String::new();
        if reader.read_line(&mut size).await.unwrap() == 0 {
            return out;
        }
        let n = usize::from_str_radix(size.trim(), 16).unwrap();
        let mut chunk = vec![0; n + 2];
        reader.read_exact(&mut chunk).await.unwrap();
        if n == 0 {
            return out;
        }
        out.extend_from_slice(&chunk[..n]);
    }
}

/// A live feed being read: events as (name, JSON) in arrival order.
pub(crate) struct Events {
    reader: BufReader<tokio::net::TcpStream>,
    pending: String,
}

impl Events {
    pub(crate) async fn open(
        addr: std::net::SocketAddr,
        path: &str,
        token: Option<&str>,
    ) -> Events {
        let mut stream = tokio::net::TcpStream::connect(addr).await.unwrap();
        send_head(&mut stream, "GET", path, token, None).await;
        let mut reader = BufReader::new(stream);
        let (status, _) = read_head(&mut reader).await;
        assert_eq!(status, 200, "{path}");
        Events {
            reader,
            pending: String::new(),
        }
    }

    /// The next named event (keep-alive comments skipped).
    pub(crate) async fn next(&mut self) -> (String, Value) {
        loop {
            if let Some(cut) = self.pending.find("\n\n") {
                let block: String = self.pending.drain(..cut + 2).collect();
                let mut name = String::new();
                let mut data = String::new();
                for line in block.lines() {
                    if let Some(n) = line.strip_prefix("event:") {
                        name = n.trim().into();
                    } else if let Some(d) = line.strip_prefix("data:") {
                        data.push_str(d.trim());
                    }
                }
                if !data.is_empty() {
                    return (name, serde_json::from_str(&data).unwrap());
                }
                continue;
            }
            let mut size = String::new();
            assert!(
                self.reader.read_line(&mut size).await.unwrap() > 0,
                "feed ended"
            );
            let n = usize::from_str_radix(size.trim(), 16).unwrap();
            let mut chunk = vec![0; n + 2];
            self.reader.read_exact(&mut chunk).await.unwrap();
            self.pending.push_str(&String::from_utf8_lossy(&chunk[..n]));
        }
    }
}

/// The API's OpenAPI document.
pub(crate) fn openapi() -> Value {
    serde_json::from_str(gibbsline::http::OPENAPI).unwrap()
}

/// Checks `value` against `schema` (the subset the API's file uses: $ref,
/// allOf, nullable, type, enum, properties with required, items), every
/// property of an object named by the schema. Returns what does not fit.
pub(crate) fn check(
    doc: &Value,
    schema: &Value,
    value: &Value,
    at: &str,
    errors: &mut Vec<String>,
) {
    if let Some(r) = schema.get("$ref").and_then(Value::as_str) {
        let name = r.rsplit('/').next().unwrap();
        return check(doc, &doc["components"]["schemas"][name], value, at, errors);
    }
    if value.is_null() {
        if schema.get("nullable") != Some(&Value::Bool(true)) {
            errors.push(format!("{at}: null where the schema does not allow it"));
        }
        return;
    }
    if let Some(parts) = schema.get("allOf").and_then(Value::as_array) {
        if value.is_object() {
            let names = property_names(doc, schema);
            unknown_properties(value, &names, at, errors);
        }
        for part in parts {
            check_members(doc, part, value, at, errors);
        }
        return;
    }
    check_members(doc, schema, value, at, errors);
    if value.is_object() && schema.get("properties").is_some() {
        unknown_properties(value, &property_names(doc, schema), at, errors);
    }
}

fn check_members(doc: &Value, schema: &Value, value: &Value, at: &str, errors: &mut Vec<String>) {
    if let Some(r) = schema.get("$ref").and_then(Value::as_str) {
        let name = r.rsplit('/').next().unwrap();
        return check_members(doc, &doc["components"]["schemas"][name], value, at, errors);
    }
    let ty = schema.get("type").and_then(Value::as_str).unwrap_or("");
    let fits = match ty {
        "object" => value.is_object(),
        "array" => value.is_array(),
        "string" => value.is_string(),
        "number" => value.is_number(),
        "integer" => value.is_i64() || value.is_u64(),
        "boolean" => value.is_boolean(),
        _ => true,
    };
    if !fits {
        errors.push(format!("{at}: {value} is not {ty}"));
        return;
    }
    if let Some(allowed) = schema.get("enum").and_then(Value::as_array)
        && !allowed.contains(value)
    {
        errors.push(format!("{at}: {value} is not one of {allowed:?}"));
    }
    if let Some(required) = schema.get("required").and_then(Value::as_array) {
        for r in required {
            let r = r.as_str().unwrap();
            if value.get(r).is_none() {
                errors.push(format!("{at}: {r} missing"));
            }
        }
    }
    if let Some(props) = schema.get("properties").and_then(Value::as_object) {
        for (name, sub) in props {
            if let Some(v) = value.get(name) {
                check(doc, sub, v, &format!("{at}.{name}"), errors);
            }
        }
    }
    if let (Some(items), Some(list)) = (schema.get("items"), value.as_array()) {
        for (i, v) in list.iter().enumerate() {
            check(doc, items, v, &format!("{at}[{i}]"), errors);
        }
    }
}

fn property_names(doc: &Value, schema: &Value) -> BTreeSet<String> {
    if let Some(r) = schema.get("$ref").and_then(Value::as_str) {
        let name = r.rsplit('/').next().unwrap();
        return property_names(doc, &doc["components"]["schemas"][name]);
    }
    let mut names: BTreeSet<String> = schema
        .get("properties")
        .and_then(Value::as_object)
        .map(|p| p.keys().cloned().collect())
        .unwrap_or_default();
    for part in schema
        .get("allOf")
        .and_then(Value::as_array)
        .into_iter()
        .flatten()
    {
        names.extend(property_names(doc, part));
    }
    names
}

fn unknown_properties(value: &Value, names: &BTreeSet<String>, at: &str, errors: &mut Vec<String>) {
    for key in value.as_object().unwrap().keys() {
        if !names.contains(key) {
            errors.push(format!("{at}.{key}: not in the schema"));
        }
    }
}

/// Checks a 200 answer's body against the schema its path and method
/// document; panics listing every misfit.
pub(crate) fn assert_documented(doc: &Value, path: &str, method: &str, answer: &Answer) {
    assert_eq!(
        answer.status,
        200,
        "{method} {path}: {}",
        String::from_utf8_lossy(&answer.body)
    );
    let schema =
        &doc["paths"][path][method]["responses"]["200"]["content"]["application/json"]["schema"];
    assert!(!schema.is_null(), "{method} {path} is not documented");
    let mut errors = Vec::new();
    check(doc, schema, &answer.json(), path, &mut errors);
    assert!(errors.is_empty(), "{method} {path}:\n{}", errors.join("\n"));
}
