"""The review page's one HTML file: inline styles, an inline script and the version's data, nothing fetched.

The data sits in a ``<script type="application/json">`` block (arrays as base64 little-endian bytes, decoded
once into typed arrays); the script builds the search, the neighbour table and a canvas map per column. Every
category name reaches the page through ``textContent``, never as markup. Opens from a file or from MLflow's
artifact view; no server, no network, no fonts or libraries from elsewhere.
"""

from __future__ import annotations

import json

from entivec.tasks.present.html import CAUTION, esc

_CSS = """
body{font-family:system-ui,-apple-system,Segoe UI,Helvetica,Arial,sans-serif;margin:1.5em auto;max-width:1200px;
color:#1d232a;line-height:1.4;padding:0 1em}h1{font-size:1.5em;border-bottom:2px solid #d0d7de;padding-bottom:.3em}
h2{font-size:1.2em;margin-top:1.6em}h3{font-size:1em}table{border-collapse:collapse;margin:.5em 0;font-size:.88em;
max-width:100%}th,td{border:1px solid #d0d7de;padding:.2em .5em;text-align:left;vertical-align:top;
overflow-wrap:anywhere}th{background:#f3f5f7;overflow-wrap:normal}td.num{text-align:right;font-variant-numeric:tabular-nums}
.pass{color:#1a7f37;font-weight:600}.fail{color:#cf222e;font-weight:600}.info{color:#57606a}
.muted{color:#57606a;font-size:.9em}.caution{background:#fff8c5;border:1px solid #d4a72c;padding:.6em .8em;
border-radius:6px}.grid{display:flex;flex-wrap:wrap;gap:1.2em}.pane{flex:1 1 430px;min-width:0}
#search{font-size:1.05em;padding:.35em .5em;width:100%;box-sizing:border-box}
#suggestions{list-style:none;margin:0;padding:0;border:1px solid #d0d7de;max-height:16em;overflow-y:auto}
#suggestions:empty{display:none}#suggestions li{padding:.15em .5em;cursor:pointer}
#suggestions li:hover,#suggestions li.on{background:#ddf4ff}.badge{font-size:.75em;padding:0 .35em;
border-radius:4px;margin-left:.4em;background:#ffebe9;color:#82071e}.badge.new{background:#dafbe1;color:#116329}
canvas{border:1px solid #d0d7de;max-width:100%;cursor:crosshair}#legend span.sw{display:inline-block;width:.8em;
height:.8em;border-radius:50%;margin:0 .3em 0 .8em;vertical-align:middle}a.cat{cursor:pointer;color:#0969da}
#tip{position:fixed;pointer-events:none;background:#1d232a;color:#fff;font-size:.8em;padding:.15em .4em;
border-radius:4px;display:none}
"""

_JS = r"""
(function(){
"use strict";
const t0=performance.now(),D=JSON.parse(document.getElementById("entivec-data").textContent);
const $=id=>document.getElementById(id),el=(tag,text,cls)=>{const e=document.createElement(tag);
 if(text!==undefined&&text!==null)e.textContent=text;if(cls)e.className=cls;return e;};
function buf(s){const b=atob(s),n=b.length,u=new Uint8Array(n);for(let i=0;i<n;i++)u[i]=b.charCodeAt(i);
 return u.buffer;}
const PALETTE=["#1f77b4","#d95f02","#1b9e77","#7570b3","#e7298a","#66a61e","#e6ab02","#a6761d","#17becf","#8c564b"];
const cols=D.columns.map(c=>{const o={name:c.name,cats:c.categories,k:c.k,explained:c.explained,dropped:c.dropped,
 counts:new Float64Array(buf(c.counts)),nb:c.neighbours?new Int32Array(buf(c.neighbours)):null,
 dist:c.distances?new Float32Array(buf(c.distances)):null,vec:c.vectors?new Float32Array(buf(c.vectors)):null,
 xy:new Float32Array(buf(c.xy)),isNew:c.new?new Uint8Array(buf(c.new)):null,groups:c.groups,
 groupsNote:c.groups_note||null,unknown:c.unknown_count,dim:c.dimension};
 o.lower=o.cats.map(s=>s.toLowerCase());o.index=new Map(o.cats.map((s,i)=>[s,i]));
 if(c.confidence){o.spread=new Float32Array(buf(c.confidence.spread));
  o.rel=new Float32Array(buf(c.confidence.relative_spread));o.allFolds=new Uint8Array(buf(c.confidence.in_all_folds));}
 if(c.groups)o.codes=new Int32Array(buf(c.groups.codes));
 let m=1;for(let i=0;i<o.counts.length;i++)if(o.counts[i]>m)m=o.counts[i];o.maxCount=m;
 o.order=Array.from(o.cats.keys()).sort((a,b)=>o.counts[b]-o.counts[a]);return o;});
let cur=0,picked=-1,view=null;
const fmt=(v,p)=>Number.isFinite(v)?v.toPrecision(p||4):"–",int=v=>Math.round(v).toLocaleString("en");
function colour(c,i){if(!c.codes)return PALETTE[0];const g=c.codes[i];return g<0?"#bbbbbb":g<PALETTE.length?
 PALETTE[g]:"#888888";}
function radius(c,i){return 1.5+6*Math.sqrt(c.counts[i]/c.maxCount);}
function confCells(c,i,row){if(!c.spread)return;row.append(el("td",fmt(c.rel[i],3),"num"),
 el("td",c.allFolds[i]?"yes":"no"));}
function nameCell(c,i){const td=el("td"),a=el("a",c.cats[i],"cat");a.onclick=()=>pick(i);td.append(a);
 if(c.isNew&&c.isNew[i])td.append(el("span","new","badge new"));return td;}
function near(c,i){if(!c.vec){const a=[],b=[];for(let r=0;r<c.k;r++){a.push(c.nb[i*c.k+r]);b.push(c.dist[i*c.k+r]);}
 return [a,b];}
 // exact: squared distances in double precision from the float32 vectors; ties keep the lower index first
 const d=c.dim,n=c.cats.length,k=c.k,bi=[],bd=[];for(let j=0;j<n;j++){if(j===i)continue;let s=0;
 for(let q=0;q<d;q++){const t=c.vec[i*d+q]-c.vec[j*d+q];s+=t*t;}
 if(bi.length<k||s<bd[bd.length-1]){let p=bi.length<k?bi.length:k-1;if(bi.length<k){bi.push(j);bd.push(s);}
  while(p>0&&bd[p-1]>s){bi[p]=bi[p-1];bd[p]=bd[p-1];p--;}bi[p]=j;bd[p]=s;}}
 return [bi,bd.map(Math.sqrt)];}
function pick(i){const c=cols[cur];picked=i;$("search").value=c.cats[i];$("suggestions").replaceChildren();
 const d=$("detail");d.replaceChildren();const h=el("h3",c.cats[i]);
 if(c.isNew&&c.isNew[i])h.append(el("span","new since production v"+D.production_version,"badge new"));d.append(h);
 const facts=["training rows: "+int(c.counts[i])];
 if(c.spread)facts.push("spread of fold vectors: "+fmt(c.spread[i],3)+" (relative "+fmt(c.rel[i],3)+
  "), in every fold: "+(c.allFolds[i]?"yes":"no"));
 if(c.codes)facts.push(c.groups.column+": "+(c.codes[i]<0?"(none)":c.groups.names[c.codes[i]]));
 d.append(el("p",facts.join(" · "),"muted"));
 const tb=el("table");tb.id="neighbours";const hr=el("tr");
 ["rank","nearest category","distance","training rows"].concat(c.spread?["relative spread","in every fold"]:[])
  .forEach(s=>hr.append(el("th",s)));const th=el("thead");th.append(hr);tb.append(th);const body=el("tbody");
 const [ni,nd]=near(c,i);for(let r=0;r<ni.length;r++){const j=ni[r],row=el("tr");row.append(el("td",String(r+1),
  "num"),nameCell(c,j),el("td",fmt(nd[r],6),"num"),el("td",int(c.counts[j]),"num"));confCells(c,j,row);
  body.append(row);}
 tb.append(body);d.append(tb);draw();}
function suggest(){const c=cols[cur],q=$("search").value.trim().toLowerCase(),ul=$("suggestions");
 ul.replaceChildren();if(!q)return;const exact=[],pre=[],sub=[];
 for(let i=0;i<c.lower.length&&pre.length<30;i++){const s=c.lower[i];if(s===q)exact.push(i);
  else if(s.startsWith(q))pre.push(i);else if(sub.length<30&&s.includes(q))sub.push(i);}
 const hits=exact.concat(pre,sub).slice(0,30);
 if(!hits.length){ul.append(el("li","no category matches","muted"));return;}
 hits.forEach((i,n)=>{const li=el("li",c.cats[i]);if(!n)li.className="on";li.onclick=()=>pick(i);
  li.append(el("span",int(c.counts[i])+" rows","muted"));if(c.isNew&&c.isNew[i])li.append(el("span","new","badge new"));
  ul.append(li);});}
function draw(){const c=cols[cur],cv=$("map"),ctx=cv.getContext("2d"),W=cv.width,H=cv.height,pad=46,n=c.cats.length;
 let x0=Infinity,x1=-Infinity,y0=Infinity,y1=-Infinity;const pts=[];
 for(let i=0;i<n;i++){pts.push([c.xy[2*i],c.xy[2*i+1]]);}
 c.dropped.forEach(p=>{if(p.x!==null)pts.push([p.x,p.y]);});
 pts.forEach(p=>{x0=Math.min(x0,p[0]);x1=Math.max(x1,p[0]);y0=Math.min(y0,p[1]);y1=Math.max(y1,p[1]);});
 if(!(x1>x0))x1=x0+1;if(!(y1>y0))y1=y0+1;
 const sx=v=>pad+(v-x0)/(x1-x0)*(W-2*pad),sy=v=>H-pad-(v-y0)/(y1-y0)*(H-2*pad);view={sx,sy};
 ctx.fillStyle="#fff";ctx.fillRect(0,0,W,H);ctx.strokeStyle="#d0d7de";ctx.strokeRect(pad,pad,W-2*pad,H-2*pad);
 ctx.fillStyle="#1d232a";ctx.font="12px system-ui,sans-serif";ctx.textAlign="center";
 ctx.fillText(axis(1,c),W/2,H-12);ctx.save();ctx.translate(14,H/2);ctx.rotate(-Math.PI/2);ctx.fillText(axis(2,c),0,0);
 ctx.restore();ctx.globalAlpha=0.7;
 for(const i of c.order){ctx.beginPath();ctx.arc(sx(c.xy[2*i]),sy(c.xy[2*i+1]),radius(c,i),0,6.2832);
  ctx.fillStyle=colour(c,i);ctx.fill();}
 ctx.globalAlpha=1;
 if(c.isNew){ctx.strokeStyle="#116329";ctx.lineWidth=1.6;for(let i=0;i<n;i++)if(c.isNew[i]){ctx.beginPath();
  ctx.arc(sx(c.xy[2*i]),sy(c.xy[2*i+1]),radius(c,i)+2.5,0,6.2832);ctx.stroke();}}
 ctx.strokeStyle="#cf222e";ctx.lineWidth=1.4;c.dropped.forEach(p=>{if(p.x===null)return;const X=sx(p.x),Y=sy(p.y);
  ctx.beginPath();ctx.moveTo(X-4,Y-4);ctx.lineTo(X+4,Y+4);ctx.moveTo(X+4,Y-4);ctx.lineTo(X-4,Y+4);ctx.stroke();});
 if(picked>=0){const X=sx(c.xy[2*picked]),Y=sy(c.xy[2*picked+1]);ctx.strokeStyle="#000";ctx.lineWidth=2;
  ctx.beginPath();ctx.arc(X,Y,radius(c,picked)+5,0,6.2832);ctx.stroke();ctx.fillStyle="#000";ctx.textAlign="left";
  ctx.fillText(c.cats[picked],X+radius(c,picked)+7,Y+4);}}
function axis(a,c){return "PC"+a+": "+(100*c.explained[a-1]).toFixed(1)+"% of the variance";}
function legend(){const c=cols[cur],lg=$("legend");lg.replaceChildren();
 const item=(col,text,shape)=>{const s=el("span","","sw");if(shape==="ring"){s.style.border="2px solid "+col;}
  else if(shape==="x"){s.textContent="×";s.style.color=col;s.style.borderRadius="0";s.style.width="auto";}
  else s.style.background=col;lg.append(s,document.createTextNode(text));};
 if(c.codes){c.groups.names.slice(0,PALETTE.length).forEach((g,i)=>item(PALETTE[i],g));
  if(c.groups.names.length>PALETTE.length)item("#888888","other "+c.groups.column+" values");
  item("#bbbbbb","(no group)");}
 else item(PALETTE[0],"categories");
 if(c.isNew&&c.isNew.some(v=>v))item("#116329","new since production v"+D.production_version,"ring");
 if(c.dropped.length)item("#cf222e","dropped since production v"+D.production_version+
  " (production's vector, aligned)","x");
 lg.append(el("div","Point area grows with the training rows of the category; "+
  (c.codes?"colour: most frequent "+c.groups.column+" of the category.":
   "no group column declared (spec review.groups)."),
  "muted"));$("axes").textContent="Horizontal: "+axis(1,c)+". Vertical: "+axis(2,c)+".";}
function showColumn(i){cur=i;picked=-1;const c=cols[i];$("search").value="";$("suggestions").replaceChildren();
 $("detail").replaceChildren(el("p","Type a category above to see its "+c.k+" nearest neighbours.","muted"));
 $("summary").textContent=c.cats.length.toLocaleString("en")+" known categories, "+c.dim+"-dimensional vectors, "+
  int(c.unknown)+" training rows on the unknown row"+(c.spread?"":"; this version has no confidence figures")+
  (c.groupsNote?"; "+c.groupsNote:"")+".";
 const dl=$("dropped");dl.replaceChildren();if(c.dropped.length){dl.append(el("h3","Dropped since production v"+
  D.production_version+" ("+c.dropped.length+")"));dl.append(el("p",c.dropped.slice(0,300).map(p=>p.category+
  " ("+int(p.count)+")").join(", ")+(c.dropped.length>300?" …":""),"muted"));}
 legend();draw();}
const sel=$("column");cols.forEach((c,i)=>sel.append(new Option(c.name,String(i))));
sel.onchange=()=>showColumn(Number(sel.value));
$("search").addEventListener("input",suggest);
$("search").addEventListener("keydown",e=>{if(e.key==="Enter"){const c=cols[cur],q=$("search").value.trim();
 const i=c.index.has(q)?c.index.get(q):-1;if(i>=0)pick(i);else{const f=$("suggestions").querySelector("li.on");
 if(f)f.click();}}});
const cv=$("map"),tip=$("tip");let pending=false;
cv.addEventListener("mousemove",e=>{if(pending)return;pending=true;requestAnimationFrame(()=>{pending=false;
 const c=cols[cur],r=cv.getBoundingClientRect(),mx=(e.clientX-r.left)*cv.width/r.width,
 my=(e.clientY-r.top)*cv.height/r.height;let best=-1,bd=64;for(let i=0;i<c.cats.length;i++){
 const dx=view.sx(c.xy[2*i])-mx,dy=view.sy(c.xy[2*i+1])-my,d=dx*dx+dy*dy;if(d<bd){bd=d;best=i;}}
 if(best<0){tip.style.display="none";cv.dataset.hover="";return;}cv.dataset.hover=c.cats[best];
 tip.textContent=c.cats[best]+" · "+int(c.counts[best])+" rows";tip.style.left=(e.clientX+12)+"px";
 tip.style.top=(e.clientY+12)+"px";tip.style.display="block";});});
cv.addEventListener("mouseleave",()=>{tip.style.display="none";});
cv.addEventListener("click",()=>{const c=cols[cur];if(cv.dataset.hover&&c.index.has(cv.dataset.hover))
 pick(c.index.get(cv.dataset.hover));});
showColumn(0);
window.entivecReview={ready:true,setupMs:performance.now()-t0,columns:cols.map(c=>c.name)};
})();
"""


def _json_for_script(data: dict) -> str:
    # "</" would end the script block early; "\u003c/" is the same JSON string
    return json.dumps(data, ensure_ascii=False, separators=(",", ":"), allow_nan=False).replace("</", "\\u003c/")


def review_page(title: str, data: dict, gate_sections: list[str]) -> str:
    """The whole page: facts, the caution, search and neighbours, the map, dropped categories, the gate's figures."""
    facts = "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in data["facts"])
    gates = gate_sections or ['<p class="muted">No gate has judged this version yet; each '
                              "<code>entivec promote</code> of it writes this page again with the gate's "
                              "figures.</p>"]
    return (
        f'<!DOCTYPE html><html lang="en"><head><meta charset="utf-8"><title>{esc(title)}</title>'
        f'<meta name="viewport" content="width=device-width,initial-scale=1"><style>{_CSS}</style></head><body>'
        f"<h1>{esc(title)}</h1><table>{facts}</table>"
        f'<p class="caution">{esc(CAUTION)} Nearest neighbours and groups here describe vectors, not people.</p>'
        '<p><label for="column">Column </label><select id="column"></select> <span id="summary" class="muted">'
        '</span></p><div class="grid"><div class="pane"><h2>Nearest neighbours</h2>'
        '<input id="search" type="search" placeholder="Type a category…" autocomplete="off" aria-label="category">'
        '<ul id="suggestions"></ul><div id="detail"></div>'
        '<p class="muted">Distance: Euclidean, between this version\'s vectors. Relative spread: how far the '
        "category's vectors from the cross-fitting networks lie from its vector, over the column's median distance "
        "between categories (lower is better determined).</p></div>"
        '<div class="pane"><h2>Map of the vectors</h2><canvas id="map" width="560" height="480" '
        'aria-label="first two principal components"></canvas><p id="axes" class="muted"></p><div id="legend"></div>'
        '<div id="dropped"></div></div></div><h2>The gate\'s figures</h2>' + "".join(gates)
        + '<div id="tip"></div>'
        f'<script id="entivec-data" type="application/json">{_json_for_script(data)}</script>'
        f"<script>{_JS}</script></body></html>"
    )
