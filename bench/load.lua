-- wrk script for `make load`: POST the bench suite's chart requests round-robin.
-- Bodies come from the JSON array in $SLUICE_LOAD_BODIES, one request per element, written
-- by bench/load.py. $SLUICE_LOAD_NOCACHE=1 adds "Cache-Control: no-cache".

local bodies = {}

local function split_bodies(text)
  -- the file is a JSON array of objects: split at top-level commas by brace depth
  local out, depth, start, in_str, esc = {}, 0, nil, false, false
  for i = 1, #text do
    local c = text:sub(i, i)
    if in_str then
      if esc then esc = false
      elseif c == "\\" then esc = true
      elseif c == '"' then in_str = false end
    elseif c == '"' then in_str = true
    elseif c == "{" then
      if depth == 0 then start = i end
      depth = depth + 1
    elseif c == "}" then
      depth = depth - 1
      if depth == 0 then table.insert(out, text:sub(start, i)) end
    end
  end
  return out
end

local counter = 0

function setup(thread)
  thread:set("id", counter)
  counter = counter + 1
end

function init(args)
  local f = assert(io.open(os.getenv("SLUICE_LOAD_BODIES"), "r"))
  bodies = split_bodies(f:read("*a"))
  f:close()
  wrk.method = "POST"
  wrk.headers["Content-Type"] = "application/json"
  if os.getenv("SLUICE_LOAD_NOCACHE") == "1" then
    wrk.headers["Cache-Control"] = "no-cache"
  end
  i = id or 0
end

function request()
  i = i + 1
  local body = bodies[(i % #bodies) + 1]
  return wrk.format(nil, nil, nil, body)
end
